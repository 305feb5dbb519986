"""A throwaway PostgreSQL server for the logbook tests: ``initdb`` in a temporary directory, started
with ``pg_ctl`` on 127.0.0.1 at a free port (no Unix socket outside that directory), stopped and
removed at the end. A real server, never a mock. When the tests run as root (CI), the server runs
as the ``postgres`` system user, since PostgreSQL refuses to run as root.

``SPINRIG_TEST_POSTGRES=postgresql://...`` uses a server already running instead.
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
import time
from pathlib import Path


def pg_bin(name: str) -> str | None:
    """The PostgreSQL program ``name`` (initdb, pg_ctl): on PATH or in Debian's versioned folder."""
    found = shutil.which(name)
    if found:
        return found
    cands = sorted(glob.glob(f"/usr/lib/postgresql/*/bin/{name}"))
    return cands[-1] if cands else None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class PgServer:
    def __init__(self):
        self.dir = Path(tempfile.mkdtemp(prefix="spinrig-pg-"))
        self.port = _free_port()
        self.user = None  # run the server as this system user (root: postgres)
        if os.geteuid() == 0:
            self.user = "postgres"
            pw = pwd.getpwnam(self.user)
            os.chown(self.dir, pw.pw_uid, pw.pw_gid)
        self.data = self.dir / "data"
        self.log = self.dir / "server.log"

    def _run(self, args: list[str], **kw) -> subprocess.CompletedProcess:
        if self.user:
            args = ["runuser", "-u", self.user, "--", *args]
        return subprocess.run(args, capture_output=True, text=True, check=False, **kw)

    def start(self) -> str:
        initdb, pg_ctl = pg_bin("initdb"), pg_bin("pg_ctl")
        p = self._run([initdb, "-D", str(self.data), "-U", "spinrig", "--auth=trust", "-E", "UTF8", "--no-sync"])
        if p.returncode:
            raise RuntimeError(f"initdb failed: {p.stderr.strip()[-400:]}")
        opts = f"-c listen_addresses=127.0.0.1 -p {self.port} -c unix_socket_directories={self.dir} -c fsync=off"
        p = self._run([pg_ctl, "-D", str(self.data), "-l", str(self.log), "-o", opts, "-w", "-t", "60", "start"])
        if p.returncode:
            log = self.log.read_text(errors="replace")[-400:] if self.log.exists() else ""
            raise RuntimeError(f"pg_ctl start failed: {p.stderr.strip()[-400:]} {log}")
        return f"postgresql://spinrig@127.0.0.1:{self.port}/postgres"

    def stop(self) -> None:
        pg_ctl = pg_bin("pg_ctl")
        if pg_ctl and self.data.exists():
            self._run([pg_ctl, "-D", str(self.data), "-m", "immediate", "-w", "stop"])
        shutil.rmtree(self.dir, ignore_errors=True)


def fresh_database(url: str) -> str:
    """A new, empty database on the server at ``url`` (one per test); returns its URL."""
    import sqlalchemy as sa

    name = f"t{os.getpid()}_{time.monotonic_ns()}"
    eng = sa.create_engine(url.replace("postgresql://", "postgresql+psycopg://"), isolation_level="AUTOCOMMIT")
    try:
        with eng.connect() as c:
            c.exec_driver_sql(f'CREATE DATABASE "{name}"')
    finally:
        eng.dispose()
    return url.rsplit("/", 1)[0] + "/" + name
