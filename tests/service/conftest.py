"""Fixtures for the service tests: a database for each backend the store supports.

``database_url`` runs a test twice: on SQLite (a file in the test's temporary
folder) and on PostgreSQL. For PostgreSQL the session starts its own throwaway
cluster from Debian's server binaries (initdb + pg_ctl in a temporary folder,
trust authentication, loopback TCP on a free port, fsync off) the first time a test
asks for it, and gives each test a fresh database. Run as root, the server runs as
the ``postgres`` user (initdb refuses root); the tests connect over TCP.

The PostgreSQL tests never skip: without the server binaries the fixture fails and
names the command that installs them (``scripts/system-deps.sh`` does it for
``make test``).
"""

from __future__ import annotations

import itertools
import os
import shutil
import socket
import subprocess
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import psycopg
import pytest

POSTGRES_LIB = Path("/usr/lib/postgresql")
INSTALL_POSTGRES = "sudo apt-get install -y postgresql"
_SERVER_USER = "postgres"
_databases = itertools.count(1)


@dataclass(frozen=True)
class PostgresServer:
    """A running throwaway PostgreSQL cluster on 127.0.0.1."""

    port: int
    version: int
    user: str = "postgres"
    host: str = "127.0.0.1"

    def url(self, database: str) -> str:
        """SQLAlchemy URL of one of its databases."""
        return f"postgresql+psycopg://{self.user}@{self.host}:{self.port}/{database}"

    def admin(self) -> psycopg.Connection[tuple[object, ...]]:
        """An autocommit connection to the maintenance database."""
        return psycopg.connect(
            host=self.host, port=self.port, user=self.user, dbname="postgres", autocommit=True
        )


def _server_binaries() -> tuple[Path, int]:
    found = []
    for initdb in POSTGRES_LIB.glob("*/bin/initdb"):
        version = initdb.parent.parent.name
        if version.isdigit() and (initdb.parent / "pg_ctl").exists():
            found.append((int(version), initdb.parent))
    if not found:
        pytest.fail(
            f"PostgreSQL server binaries (initdb, pg_ctl) not found under {POSTGRES_LIB}; "
            f"install them with: {INSTALL_POSTGRES}",
            pytrace=False,
        )
    version, bindir = max(found)
    return bindir, version


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        port: int = probe.getsockname()[1]
        return port


def _run(command: list[str], as_root: bool, cwd: Path) -> None:
    if as_root:
        command = ["runuser", "-u", _SERVER_USER, "--", *command]
    result = subprocess.run(command, cwd=cwd, capture_output=True, text=True, check=False)
    if result.returncode != 0:
        raise RuntimeError(
            f"{' '.join(command)} failed ({result.returncode}):\n{result.stdout}{result.stderr}"
        )


@pytest.fixture(scope="session")
def postgres_server() -> Iterator[PostgresServer]:
    """Start a throwaway PostgreSQL cluster for the test session; stop it at the end."""
    bindir, version = _server_binaries()
    as_root = os.geteuid() == 0
    root = Path(tempfile.mkdtemp(prefix="stagewatch-pg-"))
    if as_root:
        shutil.chown(root, user=_SERVER_USER)
    data, log = root / "data", root / "server.log"
    port = _free_port()
    settings = (
        f"-c listen_addresses=127.0.0.1 -p {port} -k {root} "
        "-c fsync=off -c synchronous_commit=off -c full_page_writes=off"
    )
    started = False
    try:
        _run(
            [
                str(bindir / "initdb"),
                "-D",
                str(data),
                "-A",
                "trust",
                "-U",
                "postgres",
                "-E",
                "UTF8",
                "--no-locale",
                "--no-sync",
                "--no-instructions",
            ],
            as_root,
            root,
        )
        command = [str(bindir / "pg_ctl"), "-D", str(data), "-l", str(log), "-w", "-o", settings]
        try:
            _run([*command, "start"], as_root, root)
        except RuntimeError as exc:
            server_log = log.read_text() if log.exists() else "(no log)"
            raise RuntimeError(f"{exc}\nserver log:\n{server_log}") from None
        started = True
        yield PostgresServer(port=port, version=version)
    finally:
        if started:
            _run(
                [str(bindir / "pg_ctl"), "-D", str(data), "-m", "immediate", "-w", "stop"],
                as_root,
                root,
            )
        shutil.rmtree(root, ignore_errors=True)


@pytest.fixture(params=["sqlite", "postgresql"])
def database_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """URL of an empty database: a SQLite file, or a fresh PostgreSQL database."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'stagewatch.db'}"
        return
    server: PostgresServer = request.getfixturevalue("postgres_server")
    name = f"stagewatch_test_{next(_databases)}"
    # A file copy of the small template is quicker than PostgreSQL 15's WAL-logged copy.
    strategy = " STRATEGY = FILE_COPY" if server.version >= 15 else ""
    with server.admin() as admin:
        admin.execute(f'CREATE DATABASE "{name}"{strategy}'.encode())
    try:
        yield server.url(name)
    finally:
        with server.admin() as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'.encode())
