"""Where the project store keeps its rows: one SQLite file, or a PostgreSQL database.

``Store`` writes its SQL once, with ``?`` for each value; a back end runs it in one
transaction per call:

* SQLite: a fresh connection per call (WAL mode); a write transaction is
  ``BEGIN IMMEDIATE``, which holds the whole file's write lock, so every write is
  serialised.
* PostgreSQL (psycopg 3): a few connections kept for reuse; ``?`` becomes ``%s``; a
  write transaction locks the rows it names (``lock_project``: the project's row
  ``FOR UPDATE``), so the writes that must not interleave (finishing a run against
  the project's queue of decisions, queueing a decision, numbering a run) are
  serialised per project, and projects do not wait for each other.

psycopg is imported only when a PostgreSQL address is given: a workstation with SQLite
needs nothing beyond the standard library.
"""

from __future__ import annotations

import sqlite3
import threading
import time
import weakref
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit, urlunsplit

#: Seconds a kept PostgreSQL connection may stay idle before it is replaced by a new one
#: (a server restarted meanwhile would otherwise cost the next request an error).
_IDLE_SECONDS = 30.0
#: Idle PostgreSQL connections kept per store.
_KEPT_CONNECTIONS = 8


def is_database_url(location: object) -> bool:
    """True for a PostgreSQL address (``postgresql://…`` or ``postgres://…``)."""
    return isinstance(location, str) and location.startswith(("postgresql://", "postgres://"))


def without_password(url: str) -> str:
    """The address as it may be logged: any password replaced by ``***``."""
    parts = urlsplit(url)
    if parts.password is None:
        return url
    host = parts.netloc.rpartition("@")[2]
    user = parts.username or ""
    return urlunsplit(parts._replace(netloc=f"{user}:***@{host}"))


def storage_errors() -> tuple[type[Exception], ...]:
    """The exceptions that mean "the database cannot be used" for the installed back ends
    (with PostgreSQL also the task queue's, which wraps psycopg's when it cannot connect)."""
    errors: list[type[Exception]] = [sqlite3.Error]
    try:
        import psycopg
    except ImportError:
        pass
    else:
        errors.append(psycopg.Error)
    try:
        from procrastinate.exceptions import ConnectorException
    except ImportError:
        pass
    else:
        errors.append(ConnectorException)
    return tuple(errors)


def integrity_errors() -> tuple[type[Exception], ...]:
    """The exceptions a broken constraint raises (a run of a project that does not exist)."""
    errors: list[type[Exception]] = [sqlite3.IntegrityError]
    try:
        import psycopg
    except ImportError:
        pass
    else:
        errors.append(psycopg.IntegrityError)
    return tuple(errors)


class Transaction:
    """One transaction of either back end: ``execute`` with ``?`` placeholders."""

    def __init__(self, connection: Any, *, postgresql: bool) -> None:
        self._connection = connection
        self._postgresql = postgresql

    def execute(self, sql: str, params: tuple[Any, ...] | list[Any] = ()) -> Any:
        if self._postgresql:
            return self._connection.execute(_postgresql_sql(sql), params)
        return self._connection.execute(sql, params)

    def lock_project(self, project_id: str) -> Any:
        """Hold the project's row until the end of the transaction; its ``deleted`` column
        (None: live) or None when there is no such project."""
        suffix = " FOR UPDATE" if self._postgresql else ""
        return self.execute(
            "SELECT deleted, 1 FROM projects WHERE id = ?" + suffix,  # noqa: S608 (a constant)
            (project_id,),
        ).fetchone()


_SQL_CACHE: dict[str, str] = {}


def _postgresql_sql(sql: str) -> str:
    """``?`` placeholders as psycopg's ``%s`` (the store's SQL has no ``?`` or ``%`` in
    its literals)."""
    cached = _SQL_CACHE.get(sql)
    if cached is None:
        cached = _SQL_CACHE[sql] = sql.replace("%", "%%").replace("?", "%s")
    return cached


@dataclass(frozen=True, slots=True)
class Dialect:
    """What differs in the store's own SQL between the back ends."""

    name: str
    #: the column that orders rows created in the same second, oldest first
    row_order: str


SQLITE = Dialect("sqlite", "rowid")
POSTGRESQL = Dialect("postgresql", "seq")


class SqliteBackend:
    """One SQLite file, a fresh connection per call."""

    dialect = SQLITE

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)

    @property
    def location(self) -> str:
        return f"the data folder {self.path.parent}"

    def _connect(self) -> sqlite3.Connection:
        connection = sqlite3.connect(self.path, timeout=30.0, isolation_level=None)
        connection.execute("PRAGMA foreign_keys = ON")
        connection.execute("PRAGMA busy_timeout = 30000")
        return connection

    def prepare(self) -> None:
        """WAL mode: readers never wait for the writer, and a kill leaves a sound file."""
        connection = self._connect()
        try:
            connection.execute("PRAGMA journal_mode=WAL")
        finally:
            connection.close()

    @contextmanager
    def write(self) -> Iterator[Transaction]:
        """One transaction on a fresh connection: committed on success, rolled back on error."""
        connection = self._connect()
        try:
            connection.execute("BEGIN IMMEDIATE")
            try:
                yield Transaction(connection, postgresql=False)
            except BaseException:
                connection.execute("ROLLBACK")
                raise
            connection.execute("COMMIT")
        finally:
            connection.close()

    @contextmanager
    def read(self) -> Iterator[Transaction]:
        connection = self._connect()
        try:
            yield Transaction(connection, postgresql=False)
        finally:
            connection.close()

    def close(self) -> None:
        """Nothing is kept open between calls."""


class PostgresBackend:
    """A PostgreSQL database through psycopg 3, a few connections kept for reuse."""

    dialect = POSTGRESQL

    def __init__(self, url: str) -> None:
        import psycopg

        self._psycopg = psycopg
        self.url = url
        self._idle: list[tuple[Any, float]] = []
        self._lock = threading.Lock()
        # a store dropped without close() still closes what it kept
        weakref.finalize(self, _close_idle, self._idle)

    @property
    def location(self) -> str:
        return f"the database {without_password(self.url)}"

    def prepare(self) -> None:
        """Nothing to set: PostgreSQL's own log makes every commit durable."""

    def _take(self) -> Any:
        now = time.monotonic()
        with self._lock:
            while self._idle:
                connection, since = self._idle.pop()
                if not connection.closed and not connection.broken and now - since < _IDLE_SECONDS:
                    return connection
                connection.close()
        return self._psycopg.connect(self.url, autocommit=True, connect_timeout=10)

    def _give_back(self, connection: Any) -> None:
        idle = self._psycopg.pq.TransactionStatus.IDLE
        if connection.closed or connection.broken or connection.info.transaction_status != idle:
            connection.close()
            return
        with self._lock:
            if len(self._idle) < _KEPT_CONNECTIONS:
                self._idle.append((connection, time.monotonic()))
                return
        connection.close()

    @contextmanager
    def _transaction(self) -> Iterator[Transaction]:
        connection = self._take()
        try:
            with connection.transaction():
                yield Transaction(connection, postgresql=True)
        finally:
            self._give_back(connection)  # kept only if sound and outside a transaction

    def write(self) -> Any:
        return self._transaction()

    def read(self) -> Any:
        return self._transaction()

    def close(self) -> None:
        """Close the kept connections (the store stays usable: new ones are opened)."""
        with self._lock:
            _close_idle(self._idle)


def _close_idle(idle: list[tuple[Any, float]]) -> None:
    """Close and forget the kept connections (the list is emptied in place)."""
    while idle:
        connection, _ = idle.pop()
        connection.close()
