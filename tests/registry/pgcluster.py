"""A throwaway PostgreSQL server for the registry tests, started from the Debian binaries.

`initdb` and `pg_ctl` from /usr/lib/postgresql/<major>/bin build a cluster in a temporary
directory and run it on a free loopback port. PostgreSQL refuses to run as root, so under root
the commands run as the `postgres` system user (`runuser -u postgres`), and the directory is
handed to that user.

fsync is off: these tests kill seedbed servers, never the database's machine, and a committed
transaction survives the death of a client process without any fsync. (Power-loss durability is
PostgreSQL's own, unchanged in production.)
"""

from __future__ import annotations

import contextlib
import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import urlsplit, urlunsplit

import psycopg

START_TIMEOUT_S = 60


class ClusterUnavailable(RuntimeError):  # noqa: N818 - reads as a state, like the core's names
    """No PostgreSQL can be started here (the message says why)."""


def _binaries() -> Path:
    found = sorted(
        glob.glob("/usr/lib/postgresql/*/bin/initdb"),
        key=lambda p: int(Path(p).parts[4]) if Path(p).parts[4].isdigit() else 0,
    )
    if not found:
        raise ClusterUnavailable(
            "no PostgreSQL binaries under /usr/lib/postgresql/*/bin (apt-get install postgresql)"
        )
    return Path(found[-1]).parent


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class Cluster:
    directory: Path
    port: int
    bin_dir: Path
    run_as: str | None

    @property
    def admin_url(self) -> str:
        return f"postgresql://postgres@127.0.0.1:{self.port}/postgres"

    def _cmd(self, *args: str) -> list[str]:
        return (["runuser", "-u", self.run_as, "--"] if self.run_as else []) + list(args)

    def stop(self) -> None:
        subprocess.run(
            self._cmd(
                str(self.bin_dir / "pg_ctl"),
                "-D",
                str(self.directory / "data"),
                "-m",
                "immediate",
                "-w",
                "stop",
            ),
            capture_output=True,
            timeout=60,
            check=False,
        )
        shutil.rmtree(self.directory, ignore_errors=True)


def start_cluster() -> Cluster:
    bin_dir = _binaries()
    run_as: str | None = None
    directory = Path(tempfile.mkdtemp(prefix="seedbed-pg-"))
    if os.geteuid() == 0:
        try:
            user = pwd.getpwnam("postgres")
        except KeyError:
            shutil.rmtree(directory, ignore_errors=True)
            raise ClusterUnavailable("running as root and there is no postgres user") from None
        os.chown(directory, user.pw_uid, user.pw_gid)
        run_as = "postgres"
    cluster = Cluster(directory, _free_port(), bin_dir, run_as)
    data = directory / "data"
    steps = [
        cluster._cmd(
            str(bin_dir / "initdb"),
            "-D",
            str(data),
            "-U",
            "postgres",
            "-A",
            "trust",
            "-E",
            "UTF8",
            "--locale=C",
            "--no-sync",
        ),
        cluster._cmd(
            str(bin_dir / "pg_ctl"),
            "-D",
            str(data),
            "-l",
            str(directory / "server.log"),
            "-w",
            "-t",
            str(START_TIMEOUT_S),
            "-o",
            f"-p {cluster.port} -k {directory} -c listen_addresses=127.0.0.1 -c fsync=off "
            "-c full_page_writes=off -c max_connections=300",
            "start",
        ),
    ]
    for command in steps:
        done = subprocess.run(
            command, capture_output=True, text=True, timeout=START_TIMEOUT_S + 30, check=False
        )
        if done.returncode != 0:
            log = ""
            with contextlib.suppress(OSError):
                log = (directory / "server.log").read_text(errors="replace")[-2000:]
            cluster.stop()
            raise ClusterUnavailable(
                f"{' '.join(command[:6])} ... failed ({done.returncode}):\n{done.stdout}\n"
                f"{done.stderr}\n{log}"
            )
    return cluster


def create_database(admin_url: str) -> str:
    """A new empty database on the server of `admin_url`; returns its URL."""
    name = "seedbed_t_" + uuid.uuid4().hex[:12]
    with psycopg.connect(admin_url, autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    parts = urlsplit(admin_url)
    return urlunsplit(parts._replace(path="/" + name))


def drop_database(admin_url: str, url: str) -> None:
    name = urlsplit(url).path.lstrip("/")
    with contextlib.suppress(psycopg.Error), psycopg.connect(admin_url, autocommit=True) as conn:
        conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@contextlib.contextmanager
def fresh_database(admin_url: str) -> Iterator[str]:
    url = create_database(admin_url)
    try:
        yield url
    finally:
        drop_database(admin_url, url)
