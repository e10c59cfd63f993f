"""A real PostgreSQL server for the tests, on loopback in a temporary folder, stopped afterwards.

Uses the machine's postgresql package (``.ci/run`` and ``make test`` install it when missing). PostgreSQL
refuses to run as root, so as root the server runs as the ``postgres`` system user (``runuser``).
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
from pathlib import Path


def _binary(name: str) -> str:
    found = shutil.which(name) or next(iter(sorted(glob.glob(f"/usr/lib/postgresql/*/bin/{name}"), reverse=True)), None)
    if found is None:
        raise RuntimeError(f"PostgreSQL's {name} is not installed (make test / .ci/run install the postgresql package)")
    return found


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


class PostgresServer:
    """initdb + pg_ctl start on 127.0.0.1:<free port>; ``url`` for SQLAlchemy; ``stop()`` removes everything."""

    def __init__(self) -> None:
        self.root = Path(tempfile.mkdtemp(prefix="msv-pg-", dir="/tmp"))
        self.data = self.root / "data"
        self.port = _free_port()
        self.prefix: list[str] = []
        if os.geteuid() == 0:
            user = pwd.getpwnam("postgres")  # created by the postgresql package
            os.chown(self.root, user.pw_uid, user.pw_gid)
            self.prefix = ["runuser", "-u", "postgres", "--"]
        self._run(_binary("initdb"), "-D", str(self.data), "-U", "postgres", "-A", "trust", "-E", "UTF8", "--no-sync")
        options = f"-c listen_addresses=127.0.0.1 -p {self.port} -k {self.root} -c fsync=off"
        self._run(_binary("pg_ctl"), "-D", str(self.data), "-o", options, "-l", str(self.root / "log"), "-w", "start")
        self.url = f"postgresql+psycopg://postgres@127.0.0.1:{self.port}/postgres"
        self.dsn = f"host=127.0.0.1 port={self.port} user=postgres dbname=postgres"

    def _run(self, *args: str) -> None:
        result = subprocess.run([*self.prefix, *args], capture_output=True, text=True, timeout=120)
        if result.returncode != 0:
            raise RuntimeError(f"{Path(args[0]).name} failed: {result.stderr.strip()[-500:]}")

    def stop(self) -> None:
        try:
            self._run(_binary("pg_ctl"), "-D", str(self.data), "-m", "fast", "-w", "stop")
        finally:
            shutil.rmtree(self.root, ignore_errors=True)
