"""A throwaway PostgreSQL server for the tests, and a fresh database for each test.

``STATIONFIT_TEST_POSTGRESQL=postgresql://USER@HOST:PORT/`` names a server to use (its user
must be allowed to create databases; a password comes from ``PGPASSWORD`` or ``~/.pgpass``,
which libpq reads).  Otherwise the first test that asks starts one: Debian's
``initdb`` and ``pg_ctl`` (``/usr/lib/postgresql/*/bin``) make a cluster in a temporary
folder, run as the ``postgres`` user when the tests run as root (PostgreSQL refuses to run
as root), listening on a Unix socket in that folder only, with durability settings off
(the tests kill Stationfit's processes, never the database server).  It is stopped and
removed at the end of the session.

When neither is possible, the PostgreSQL tests are skipped with the reason, which the
closing summary prints; under CI (``CI`` set) they fail instead, so that CI cannot pass
without having run them.
"""

from __future__ import annotations

import contextlib
import glob
import os
import shutil
import subprocess
import tempfile
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

#: Seconds the server may take to start.
START_TIMEOUT_S = 60


@dataclass
class Server:
    """A PostgreSQL server the tests may create databases on."""

    #: the address of its ``postgres`` database, without the database name's path
    host: str
    port: int
    user: str
    description: str

    def url(self, database: str) -> str:
        """The address of ``database`` on this server."""
        if self.host.startswith("/"):
            return f"postgresql://{self.user}@/{database}?host={self.host}&port={self.port}"
        return f"postgresql://{self.user}@{self.host}:{self.port}/{database}"

    def create_database(self) -> str:
        """A new empty database; its address."""
        import psycopg

        name = "t_" + uuid.uuid4().hex[:16]
        with psycopg.connect(self.url("postgres"), autocommit=True) as admin:
            admin.execute(f'CREATE DATABASE "{name}"')
        return self.url(name)

    def drop_database(self, url: str) -> None:
        import psycopg

        name = url.rsplit("/", 1)[1].split("?", 1)[0]
        with psycopg.connect(self.url("postgres"), autocommit=True) as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def _binaries() -> Path | None:
    """The newest installed PostgreSQL's bin folder (Debian's layout), or one on PATH."""
    found = sorted(
        glob.glob("/usr/lib/postgresql/*/bin/initdb"),
        key=lambda p: (
            int(Path(p).parent.parent.name) if Path(p).parent.parent.name.isdigit() else 0
        ),
    )
    if found:
        return Path(found[-1]).parent
    initdb = shutil.which("initdb")
    return Path(initdb).parent if initdb else None


def _as_cluster_owner(command: list[str]) -> list[str]:
    """The command run as ``postgres`` when we are root (PostgreSQL refuses root)."""
    if os.geteuid() != 0:
        return command
    return ["runuser", "-u", "postgres", "--", *command]


@contextlib.contextmanager
def _throwaway_cluster(*, durable: bool = False) -> Iterator[Server]:
    binaries = _binaries()
    if binaries is None:
        raise RuntimeError(
            "PostgreSQL is not installed (no initdb); scripts/install --test installs "
            "Debian's postgresql when run as root"
        )
    if os.geteuid() == 0:
        try:
            import pwd

            owner = pwd.getpwnam("postgres")
        except KeyError:
            raise RuntimeError("running as root and there is no 'postgres' user") from None
    folder = Path(tempfile.mkdtemp(prefix="stationfit-pg-"))
    try:
        data, socket_dir, log = folder / "data", folder / "socket", folder / "server.log"
        socket_dir.mkdir()
        if os.geteuid() == 0:
            for path in (folder, socket_dir):
                os.chown(path, owner.pw_uid, owner.pw_gid)
            folder.chmod(0o755)
        user = "postgres" if os.geteuid() == 0 else os.environ.get("USER", "postgres")
        subprocess.run(
            _as_cluster_owner(
                [str(binaries / "initdb"), "-D", str(data), "-U", user, "-A", "trust", "-E", "UTF8"]
            ),
            check=True,
            capture_output=True,
            timeout=START_TIMEOUT_S,
        )
        port = 5432
        options = (
            f"-c listen_addresses='' -c unix_socket_directories={socket_dir} -c port={port} "
            "-c max_connections=200"
        )
        if not durable:  # the tests kill Stationfit's processes, never this server
            options += " -c fsync=off -c synchronous_commit=off -c full_page_writes=off"
        subprocess.run(
            _as_cluster_owner(
                [
                    str(binaries / "pg_ctl"),
                    "-D",
                    str(data),
                    "-l",
                    str(log),
                    "-o",
                    options,
                    "-w",
                    "-t",
                    str(START_TIMEOUT_S),
                    "start",
                ]
            ),
            check=True,
            capture_output=True,
            timeout=START_TIMEOUT_S + 10,
        )
        version = (binaries / "initdb").parent.parent.name
        try:
            yield Server(
                str(socket_dir), port, user, f"a throwaway PostgreSQL {version} in {folder}"
            )
        finally:
            subprocess.run(
                _as_cluster_owner(
                    [str(binaries / "pg_ctl"), "-D", str(data), "-m", "immediate", "-w", "stop"]
                ),
                capture_output=True,
                timeout=60,
                check=False,
            )
    finally:
        shutil.rmtree(folder, ignore_errors=True)


class Provider:
    """Starts the server on first use and remembers why it could not."""

    def __init__(self) -> None:
        self._stack = contextlib.ExitStack()
        self.server: Server | None = None
        self.reason: str | None = None
        self.started = False

    def get(self) -> Server:
        if not self.started:
            self.started = True
            self._start()
        if self.server is None:
            message = f"PostgreSQL tests skipped: {self.reason}"
            if os.environ.get("CI"):
                pytest.fail(f"{message} (CI must run them)", pytrace=False)
            pytest.skip(message)
        return self.server

    def _start(self) -> None:
        try:
            import psycopg  # noqa: F401
        except ImportError:
            self.reason = "psycopg is not installed (pip install -e '.[office]')"
            return
        given = os.environ.get("STATIONFIT_TEST_POSTGRESQL")
        if given:
            from urllib.parse import urlsplit

            parts = urlsplit(given)
            self.server = Server(
                parts.hostname or "localhost",
                parts.port or 5432,
                parts.username or "postgres",
                f"the server STATIONFIT_TEST_POSTGRESQL names ({parts.hostname})",
            )
            return
        try:
            self.server = self._stack.enter_context(_throwaway_cluster())
        except (RuntimeError, OSError, subprocess.SubprocessError) as exc:
            detail = ""
            if isinstance(exc, subprocess.CalledProcessError):
                detail = (exc.stderr or b"").decode(errors="replace").strip()[-300:]
            self.reason = f"could not start a throwaway PostgreSQL: {exc} {detail}".strip()

    def close(self) -> None:
        self._stack.close()


def app_on(location: Path | str, data_dir: Path, **options):  # type: ignore[no-untyped-def]
    """The web service on a test's store (``store_location``): the SQLite file's folder, or
    the PostgreSQL database with adjustments on the service's own threads (the workers'
    own tests start worker processes)."""
    from server.web import create_app

    if isinstance(location, str):
        return create_app(data_dir, database=location, workers=False, **options)
    return create_app(location.parent, **options)
