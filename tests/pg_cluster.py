"""A throwaway PostgreSQL cluster for the store tests and the store benchmark (not a test module).

initdb into a fresh folder under /tmp, a server that listens only on a unix socket inside that
folder (no TCP), run as an unprivileged user when we are root (`runuser -u postgres --`, or
`nobody`): the cluster and socket folders are owned by that user. Clients authenticate the way the
README tells a team to: a role with a password (scram-sha-256) found through a password file
(PGPASSFILE), never on a command line. Only the cluster's own superuser connects without a
password (trust, local socket only), to make the role and the database.
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import subprocess
import tempfile
import uuid
from pathlib import Path

ROLE = "pooling_team"
PASSWORD = "Tulip-7391-quartz"  # distinctive, so that a test can look for it in every output
DATABASE = "pooltest"
PORT = 5432  # private socket folder and no TCP: no clash with any other server on the machine


def find_bin() -> Path | None:
    """The folder of initdb and pg_ctl: Debian's /usr/lib/postgresql/<version>/bin (newest), else PATH."""
    found = sorted(
        glob.glob("/usr/lib/postgresql/*/bin/initdb"),
        key=lambda p: int(Path(p).parts[-3]) if Path(p).parts[-3].isdigit() else 0,
    )
    if found:
        return Path(found[-1]).parent
    which = shutil.which("initdb")
    return Path(which).resolve().parent if which else None


def why_unavailable() -> str | None:
    """None when a cluster can be started here; otherwise the reason, for a skip message."""
    if find_bin() is None:
        return "PostgreSQL's server binaries (initdb, pg_ctl) are not installed: apt-get install postgresql"
    if os.geteuid() == 0 and _unprivileged_user() is None:
        return "running as root with no unprivileged user (postgres or nobody) to run the server as"
    try:
        import psycopg  # noqa: F401
    except ImportError:
        return "psycopg is not installed: pip install 'pooling[postgresql]'"
    return None


def _unprivileged_user() -> str | None:
    for name in ("postgres", "nobody"):
        try:
            pwd.getpwnam(name)
            return name
        except KeyError:
            continue
    return None


class Cluster:
    """Start with `start()`, stop with `stop()` (the data stay until `destroy()`), `start()` again."""

    def __init__(self, fsync: bool = True):
        self.bin = find_bin()
        self.root = Path(tempfile.mkdtemp(prefix="pooling-pg-"))
        self.data = self.root / "data"
        self.sock = self.root / "sock"
        self.sock.mkdir()
        self.log = self.root / "server.log"
        self.pgpass = self.root / "pgpass"
        self.user = _unprivileged_user() if os.geteuid() == 0 else None
        self.fsync = fsync
        self.running = False
        if self.user:
            pw = pwd.getpwnam(self.user)
            for p in (self.root, self.sock):
                os.chown(p, pw.pw_uid, pw.pw_gid)
            os.chmod(self.root, 0o755)  # the clients (root here) reach the socket through it
        self._initdb()

    def _as_server_user(self, args: list[str], **kw) -> subprocess.CompletedProcess:
        cmd = (["runuser", "-u", self.user, "--"] if self.user else []) + args
        return subprocess.run(cmd, capture_output=True, text=True, timeout=120, **kw)

    def _check(self, r: subprocess.CompletedProcess, what: str) -> None:
        if r.returncode != 0:
            log = self.log.read_text() if self.log.exists() else ""
            raise RuntimeError(f"{what} failed ({r.returncode}): {r.stdout}\n{r.stderr}\n{log[-2000:]}")

    def _initdb(self) -> None:
        r = self._as_server_user(
            [
                str(self.bin / "initdb"),
                "-D",
                str(self.data),
                "-U",
                "postgres",
                "-E",
                "UTF8",
                "--locale=C",
                "--auth-local=trust",
                "--auth-host=reject",
            ]
        )
        self._check(r, "initdb")
        hba = self.data / "pg_hba.conf"
        # the superuser without a password (for set-up only), every other role by password
        rules = "local all postgres trust\\nlocal all all scram-sha-256\\n"
        self._as_server_user(["sh", "-c", f"printf '{rules}' > {hba}"])
        self.start()
        sql = (
            f"CREATE ROLE {ROLE} LOGIN PASSWORD '{PASSWORD}'; "
            f"CREATE DATABASE {DATABASE} OWNER {ROLE} ENCODING 'UTF8' TEMPLATE template0;"
        )
        for stmt in sql.split("; "):
            self._check(self.psql_admin(stmt), "making the role and database")
        self.pgpass.write_text(f"*:*:{DATABASE}:{ROLE}:{PASSWORD}\n")
        os.chmod(self.pgpass, 0o600)

    def psql_admin(self, sql: str) -> subprocess.CompletedProcess:
        return self._as_server_user(
            [
                str(self.bin / "psql"),
                "-h",
                str(self.sock),
                "-p",
                str(PORT),
                "-U",
                "postgres",
                "-d",
                "postgres",
                "-v",
                "ON_ERROR_STOP=1",
                "-qAtc",
                sql,
            ]
        )

    def start(self) -> None:
        opts = f"-c listen_addresses='' -c unix_socket_directories='{self.sock}' -p {PORT}"
        if not self.fsync:
            opts += " -c fsync=off -c synchronous_commit=off -c full_page_writes=off"
        r = self._as_server_user(
            [str(self.bin / "pg_ctl"), "-D", str(self.data), "-l", str(self.log), "-o", opts, "-w", "-t", "60", "start"]
        )
        self._check(r, "pg_ctl start")
        self.running = True

    def stop(self, mode: str = "fast") -> None:
        if self.running:
            self._as_server_user([str(self.bin / "pg_ctl"), "-D", str(self.data), "-m", mode, "-w", "-t", "60", "stop"])
            self.running = False

    def destroy(self) -> None:
        self.stop()
        shutil.rmtree(self.root, ignore_errors=True)

    def env(self) -> dict:
        """What a client process needs: the password file (never a password on its command line)."""
        return {"PGPASSFILE": str(self.pgpass)}

    def url(self, name: str | None = None) -> str:
        base = f"postgresql://{ROLE}@/{DATABASE}?host={self.sock}&port={PORT}"
        return base if name is None else f"{base}#{name}"

    def new_url(self) -> str:
        return self.url(f"t{uuid.uuid4().hex[:12]}")
