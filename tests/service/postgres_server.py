"""A throwaway PostgreSQL server for the store tests: `initdb` + `pg_ctl` from the server binaries Debian installs
(package postgresql), on loopback, on a free port, trust authentication, in a temporary folder, stopped at the end.
PostgreSQL refuses to run as root, so as root the server runs as the `postgres` user the package creates."""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import subprocess
import tempfile
import uuid
from dataclasses import dataclass
from pathlib import Path

from service_testkit import free_port

USER = "knowngood"


def server_binaries() -> Path | None:
    """The folder holding initdb and pg_ctl: on PATH, or Debian's /usr/lib/postgresql/<version>/bin (newest)."""
    found = shutil.which("initdb")
    if found:
        return Path(found).parent
    versions = sorted(glob.glob("/usr/lib/postgresql/*/bin/pg_ctl"), key=lambda p: int(Path(p).parts[-3]))
    return Path(versions[-1]).parent if versions else None


@dataclass
class PostgresServer:
    folder: Path
    port: int
    bin: Path
    prefix: list[str]

    @property
    def url(self) -> str:
        return f"postgresql://{USER}@127.0.0.1:{self.port}/postgres"

    def new_database(self) -> str:
        """A fresh, empty database on this server; its URL."""
        import psycopg

        name = f"t_{uuid.uuid4().hex[:12]}"
        with psycopg.connect(self.url, autocommit=True) as conn:
            conn.execute(f"CREATE DATABASE {name}")
        return f"postgresql://{USER}@127.0.0.1:{self.port}/{name}"

    def stop(self) -> None:
        subprocess.run(
            [*self.prefix, str(self.bin / "pg_ctl"), "-D", str(self.folder / "data"), "-m", "immediate", "stop"],
            capture_output=True,
            timeout=60,
        )
        shutil.rmtree(self.folder, ignore_errors=True)


def start() -> PostgresServer:
    """Starts a server; raises RuntimeError saying why it cannot."""
    binaries = server_binaries()
    if binaries is None:
        raise RuntimeError("no PostgreSQL server binaries (initdb, pg_ctl): apt-get install postgresql")
    folder = Path(tempfile.mkdtemp(prefix="knowngood-pg-"))
    prefix: list[str] = []
    if os.geteuid() == 0:
        try:
            owner = pwd.getpwnam("postgres")
        except KeyError:
            raise RuntimeError("running as root and there is no 'postgres' user to run the server as") from None
        os.chown(folder, owner.pw_uid, owner.pw_gid)
        prefix = ["runuser", "-u", "postgres", "--"]
    port = free_port()
    data = folder / "data"
    steps = [
        [str(binaries / "initdb"), "-D", str(data), "-A", "trust", "-U", USER, "--no-sync", "-E", "UTF8"],
        [
            str(binaries / "pg_ctl"),
            "-D",
            str(data),
            "-l",
            str(folder / "server.log"),
            "-w",
            "-t",
            "60",
            "-o",
            f"-p {port} -k {folder} -c listen_addresses=127.0.0.1 -c fsync=off -c max_connections=100",
            "start",
        ],
    ]
    for cmd in steps:
        done = subprocess.run([*prefix, *cmd], capture_output=True, text=True, timeout=120)
        if done.returncode != 0:
            log = (folder / "server.log").read_text() if (folder / "server.log").exists() else ""
            shutil.rmtree(folder, ignore_errors=True)
            raise RuntimeError(f"{Path(cmd[0]).name} failed: {done.stderr.strip()[-500:]} {log[-500:]}")
    return PostgresServer(folder, port, binaries, prefix)
