"""A throwaway PostgreSQL server for the test session (localhost only).

The server is made with the Debian ``postgresql`` package's own programs: ``initdb`` in
a temporary folder (trust authentication, nothing on disk outlives the session) and
``pg_ctl`` on a free localhost port with its unix socket in the same temporary folder.
Durability settings are off (``fsync``, ``synchronous_commit``): a test server loses
nothing that matters when the machine crashes. Each test gets its own database.

PostgreSQL refuses to run as root; when the tests run as root (a container), the server
runs as the ``postgres`` system user the Debian package creates.
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

__all__ = ["PgServer", "find_bin_dir", "start_server"]


def find_bin_dir() -> Path | None:
    """The folder holding ``initdb`` and ``pg_ctl``, or None when PostgreSQL is absent."""
    found = shutil.which("initdb")
    if found and shutil.which("pg_ctl"):
        return Path(found).resolve().parent
    # Debian keeps the server programs off PATH, one folder per major version
    for folder in sorted(glob.glob("/usr/lib/postgresql/*/bin"), reverse=True):
        if (Path(folder) / "initdb").exists() and (Path(folder) / "pg_ctl").exists():
            return Path(folder)
    return None


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclass
class PgServer:
    """A running throwaway server: its folder, port, and how to stop it."""

    root: Path
    port: int
    bin_dir: Path
    run_as: list[str]

    @property
    def admin_url(self) -> str:
        return f"postgresql+psycopg://postgres@127.0.0.1:{self.port}/postgres"

    def url(self, database: str) -> str:
        return f"postgresql+psycopg://postgres@127.0.0.1:{self.port}/{database}"

    def _admin(self, sql: str) -> None:
        import psycopg

        with psycopg.connect(
            host="127.0.0.1", port=self.port, user="postgres", dbname="postgres", autocommit=True
        ) as conn:
            conn.execute(sql)

    def create_database(self, name: str) -> str:
        """Create an empty database; its SQLAlchemy URL."""
        self._admin(f'CREATE DATABASE "{name}"')
        return self.url(name)

    def drop_database(self, name: str) -> None:
        """Drop a database, ending any connection a test left open."""
        self._admin(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')

    def stop(self) -> None:
        """Stop the server (fast shutdown) and remove its folder."""
        subprocess.run(
            [
                *self.run_as,
                str(self.bin_dir / "pg_ctl"),
                "-D",
                str(self.root / "data"),
                "-m",
                "fast",
                "-w",
                "stop",
            ],
            check=False,
            capture_output=True,
        )
        shutil.rmtree(self.root, ignore_errors=True)


def start_server(bin_dir: Path) -> PgServer:
    """Initialise and start a server in a new temporary folder.

    Raises
    ------
    RuntimeError
        With the server's log when ``initdb`` or ``pg_ctl start`` fails.
    """
    root = Path(tempfile.mkdtemp(prefix="labeler-pg-"))
    run_as: list[str] = []
    if os.geteuid() == 0:
        user = pwd.getpwnam("postgres")
        os.chown(root, user.pw_uid, user.pw_gid)
        run_as = ["runuser", "-u", "postgres", "--"]
    port = _free_port()
    data, log = root / "data", root / "server.log"
    steps = [
        [
            str(bin_dir / "initdb"),
            "-D",
            str(data),
            "-U",
            "postgres",
            "--auth=trust",
            "--no-sync",
            "-E",
            "UTF8",
            "--locale=C",
        ],
        [
            str(bin_dir / "pg_ctl"),
            "-D",
            str(data),
            "-l",
            str(log),
            "-w",
            "-t",
            "60",
            "-o",
            f"-p {port} -k {root} -c listen_addresses=127.0.0.1 -c fsync=off "
            "-c synchronous_commit=off -c full_page_writes=off -c max_connections=100",
            "start",
        ],
    ]
    for cmd in steps:
        done = subprocess.run([*run_as, *cmd], capture_output=True, text=True, check=False)
        if done.returncode != 0:
            text = log.read_text() if log.exists() else ""
            shutil.rmtree(root, ignore_errors=True)
            raise RuntimeError(
                f"{Path(cmd[0]).name} failed ({done.returncode}): {done.stderr}\n{text}"
            )
    return PgServer(root=root, port=port, bin_dir=bin_dir, run_as=run_as)
