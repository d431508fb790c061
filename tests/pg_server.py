"""A throw-away PostgreSQL server for the tests: Debian's binaries, a temporary folder, a socket.

pg_ctl refuses to run as root, and the tests run as root on the project's
machines: then the folder is given to the user ``postgres`` and initdb / pg_ctl
run through ``runuser``. The server listens on a Unix socket in its folder only
(no TCP port), with ``trust`` authentication for its one role, and without fsync
(the tests kill daemons, never the machine).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
from pathlib import Path

ROLE = "calwarden"


def binaries() -> Path | None:
    """The newest installed PostgreSQL's bin folder, or None."""
    found = sorted(
        Path("/usr/lib/postgresql").glob("*/bin/initdb"), key=lambda p: p.parent.parent.name
    )
    return found[-1].parent if found else None


class Server:
    """One cluster in a temporary folder; :meth:`start` / :meth:`stop` it at will."""

    def __init__(self, bin_dir: Path) -> None:
        self.bin = bin_dir
        self.folder = Path(tempfile.mkdtemp(prefix="calwarden-pg-"))
        self.data = self.folder / "data"
        self.socket_dir = self.folder
        self.port = 5432
        self._as_root = os.geteuid() == 0
        self._databases = 0
        if self._as_root:
            shutil.chown(self.folder, "postgres", "postgres")
        self._run(
            "initdb", "-D", str(self.data), "-U", ROLE, "--auth=trust", "-E", "UTF8", "--no-sync"
        )
        settings = {
            "listen_addresses": "''",
            "unix_socket_directories": f"'{self.socket_dir}'",
            "fsync": "off",
            "full_page_writes": "off",
            "max_connections": "60",
        }
        with (self.data / "postgresql.conf").open("a", encoding="utf-8") as conf:
            conf.writelines(f"{key} = {value}\n" for key, value in settings.items())

    def _run(self, tool: str, *arguments: str) -> None:
        command = [str(self.bin / tool), *arguments]
        if self._as_root:
            command = ["runuser", "-u", "postgres", "--", *command]
        done = subprocess.run(command, capture_output=True, text=True, timeout=120)
        if done.returncode != 0:
            raise RuntimeError(f"{tool} failed: {done.stderr.strip() or done.stdout.strip()}")

    def start(self) -> None:
        self._run(
            "pg_ctl",
            "-D",
            str(self.data),
            "-l",
            str(self.folder / "server.log"),
            "-w",
            "-t",
            "60",
            "start",
        )

    def stop(self) -> None:
        self._run("pg_ctl", "-D", str(self.data), "-m", "fast", "-w", "-t", "60", "stop")

    def url(self, database: str = "postgres") -> str:
        return f"postgresql://{ROLE}@/{database}?host={self.socket_dir}&port={self.port}"

    def new_database(self) -> str:
        """A fresh, empty database on the server; its URL."""
        import psycopg

        self._databases += 1
        name = f"ledger_{self._databases}"
        with psycopg.connect(self.url(), autocommit=True) as connection:
            connection.execute(f"CREATE DATABASE {name}")
        return self.url(name)

    def remove(self) -> None:
        shutil.rmtree(self.folder, ignore_errors=True)
