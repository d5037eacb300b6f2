"""A small project store on SQLite: field books as uploaded, and the runs of their adjustment.

Everything about persistence stays behind ``Store`` so that another backend
can replace it later.  Each call opens its own connection, so a ``Store`` is
safe to share between threads; every write is one transaction.  The field
book is kept byte for byte as uploaded (even when it is not valid UTF-8), so
nothing the surveyor sent is lost.

A finished run keeps three JSON documents: the contract JSON
(``AdjustmentResult.to_json_dict()``), which the API serves unchanged; a full
dump of the result object, from which the pages and reports are rebuilt
without adjusting again; and a small summary for project lists.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import re
import sqlite3
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from .errors import FieldbookError, NetworkError
from .result import (
    AdjustmentResult,
    Ellipse,
    GlobalTest,
    MisclosureResult,
    ObservationResult,
    PointResult,
    RelativeResult,
    Summary,
)

SCHEMA_VERSION = 1
_ID_RE = re.compile(r"^[0-9a-f]{32}$")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS projects (
    id        TEXT PRIMARY KEY,
    name      TEXT NOT NULL,
    filename  TEXT NOT NULL,
    created   TEXT NOT NULL,
    fieldbook BLOB NOT NULL,
    sha256    TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS runs (
    id         INTEGER PRIMARY KEY AUTOINCREMENT,
    project_id TEXT NOT NULL REFERENCES projects(id) ON DELETE CASCADE,
    created    TEXT NOT NULL,
    status     TEXT NOT NULL CHECK (status IN ('finished', 'failed')),
    result     TEXT,
    detail     TEXT,
    summary    TEXT,
    error      TEXT,
    CHECK ((status = 'finished') = (result IS NOT NULL))
);
CREATE INDEX IF NOT EXISTS runs_by_project ON runs(project_id, id);
"""


def is_valid_id(value: str) -> bool:
    """True for a well-formed project id (32 lower-case hex digits)."""
    return bool(_ID_RE.match(value))


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


@dataclass(frozen=True, slots=True)
class Run:
    """One adjustment of a project: the contract JSON when it finished, the error when it failed.

    ``summary`` is the contract's ``summary`` object plus ``flagged`` (the number of
    flagged observations), small enough to list many projects quickly.
    """

    id: int
    project_id: str
    created: str
    status: str
    result_json: dict[str, Any] | None
    error: dict[str, Any] | None
    detail: dict[str, Any] | None = None
    summary: dict[str, Any] | None = None

    @property
    def finished(self) -> bool:
        """True when the adjustment produced a result."""
        return self.status == "finished"

    def result(self) -> AdjustmentResult | None:
        """The stored result object, or None if it is missing or from an incompatible version."""
        if self.detail is None:
            return None
        try:
            return _result_from_detail(self.detail)
        except (KeyError, TypeError, ValueError):
            return None


@dataclass(frozen=True, slots=True)
class Project:
    """A stored field book as uploaded."""

    id: str
    name: str
    filename: str
    created: str
    sha256: str
    fieldbook: bytes

    @property
    def text(self) -> str:
        """The field book as text (bytes that are not UTF-8 shown as U+FFFD)."""
        return self.fieldbook.decode("utf-8-sig", errors="replace")


@dataclass(frozen=True, slots=True)
class ProjectListing:
    """A project without its field book, with its latest run."""

    id: str
    name: str
    filename: str
    created: str
    sha256: str
    latest: Run | None


def error_record(error: BaseException | str) -> dict[str, Any]:
    """The JSON form of a failed run's error, keeping line numbers and point names."""
    if isinstance(error, FieldbookError):
        return {
            "kind": "fieldbook",
            "message": f"the field book has {len(error.issues)} "
            f"error{'s' if len(error.issues) != 1 else ''}",
            "issues": [
                {"line": i.line, "token": i.token, "message": i.message} for i in error.issues
            ],
        }
    if isinstance(error, NetworkError):
        return {"kind": "network", "message": error.message, "points": list(error.points)}
    return {"kind": "other", "message": str(error)}


class Store:
    """Projects and runs in one SQLite file (WAL mode, one connection per call)."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        connection = self._connect()
        try:
            connection.execute("PRAGMA journal_mode=WAL")
            (version,) = connection.execute("PRAGMA user_version").fetchone()
            if version > SCHEMA_VERSION:
                raise RuntimeError(
                    f"{self.path} was written by a newer Stationfit (schema {version}); "
                    "upgrade before opening it"
                )
            connection.executescript(
                f"BEGIN IMMEDIATE;{_SCHEMA}PRAGMA user_version = {SCHEMA_VERSION};COMMIT;"
            )
        finally:
            connection.close()

    # -- connections -----------------------------------------------------------------

    def _connect(self) -> sqlite3.Connection:
        connection = sqlite3.connect(self.path, timeout=30.0, isolation_level=None)
        connection.execute("PRAGMA foreign_keys = ON")
        connection.execute("PRAGMA busy_timeout = 30000")
        return connection

    @contextmanager
    def _write(self) -> Iterator[sqlite3.Connection]:
        """One transaction on a fresh connection: committed on success, rolled back on error."""
        connection = self._connect()
        try:
            connection.execute("BEGIN IMMEDIATE")
            try:
                yield connection
            except BaseException:
                connection.execute("ROLLBACK")
                raise
            connection.execute("COMMIT")
        finally:
            connection.close()

    @contextmanager
    def _read(self) -> Iterator[sqlite3.Connection]:
        connection = self._connect()
        try:
            yield connection
        finally:
            connection.close()

    # -- projects --------------------------------------------------------------------

    def create_project(self, name: str, filename: str, fieldbook: str | bytes) -> str:
        """Store a field book unchanged; returns the new project's id."""
        raw = fieldbook.encode("utf-8") if isinstance(fieldbook, str) else bytes(fieldbook)
        project_id = uuid.uuid4().hex
        with self._write() as db:
            db.execute(
                "INSERT INTO projects (id, name, filename, created, fieldbook, sha256) "
                "VALUES (?, ?, ?, ?, ?, ?)",
                (project_id, name, filename, _now(), raw, hashlib.sha256(raw).hexdigest()),
            )
        return project_id

    def get_project(self, project_id: str) -> Project | None:
        """The project with its field book, or None."""
        if not is_valid_id(project_id):
            return None
        with self._read() as db:
            row = db.execute(
                "SELECT id, name, filename, created, sha256, fieldbook FROM projects WHERE id = ?",
                (project_id,),
            ).fetchone()
        if row is None:
            return None
        return Project(id=row[0], name=row[1], filename=row[2], created=row[3], sha256=row[4],
                       fieldbook=bytes(row[5]))

    def list_projects(self) -> list[ProjectListing]:
        """All projects, newest first, with their latest run's summary (no field books, no results)."""
        with self._read() as db:
            rows = db.execute(
                "SELECT p.id, p.name, p.filename, p.created, p.sha256, "
                "r.id, r.created, r.status, r.summary, r.error "
                "FROM projects p LEFT JOIN runs r ON r.id = "
                "(SELECT MAX(id) FROM runs WHERE project_id = p.id) "
                "ORDER BY p.created DESC, p.rowid DESC"
            ).fetchall()
        listings = []
        for row in rows:
            latest = None
            if row[5] is not None:
                latest = Run(id=row[5], project_id=row[0], created=row[6], status=row[7],
                             result_json=None, error=_loads(row[9]), summary=_loads(row[8]))
            listings.append(ProjectListing(id=row[0], name=row[1], filename=row[2],
                                           created=row[3], sha256=row[4], latest=latest))
        return listings

    def delete_project(self, project_id: str) -> bool:
        """Delete a project and its runs; True if it existed."""
        if not is_valid_id(project_id):
            return False
        with self._write() as db:
            cursor = db.execute("DELETE FROM projects WHERE id = ?", (project_id,))
        return cursor.rowcount > 0

    # -- runs ------------------------------------------------------------------------

    def add_run(
        self,
        project_id: str,
        result: AdjustmentResult | None = None,
        error: BaseException | str | None = None,
    ) -> int:
        """Record an adjustment: finished with ``result``, or failed with ``error``."""
        if (result is None) == (error is None):
            raise ValueError("give exactly one of result and error")
        if result is not None:
            status = "finished"
            contract = result.to_json_dict()
            result_text = json.dumps(contract)
            detail_text = json.dumps(dataclasses.asdict(result))
            summary = dict(contract["summary"])  # type: ignore[call-overload]
            summary["flagged"] = sum(1 for o in result.observations if o.flagged)
            summary_text = json.dumps(summary)
            error_text = None
        else:
            assert error is not None
            status, result_text, detail_text, summary_text = "failed", None, None, None
            error_text = json.dumps(error_record(error))
        with self._write() as db:
            cursor = db.execute(
                "INSERT INTO runs (project_id, created, status, result, detail, summary, error) "
                "VALUES (?, ?, ?, ?, ?, ?, ?)",
                (project_id, _now(), status, result_text, detail_text, summary_text, error_text),
            )
        assert cursor.lastrowid is not None
        return cursor.lastrowid

    def latest_run(self, project_id: str) -> Run | None:
        """The most recent run of a project (with the full result dump), or None."""
        if not is_valid_id(project_id):
            return None
        with self._read() as db:
            row = db.execute(
                "SELECT id, project_id, created, status, result, error, detail, summary "
                "FROM runs WHERE project_id = ? ORDER BY id DESC LIMIT 1",
                (project_id,),
            ).fetchone()
        if row is None:
            return None
        return Run(id=row[0], project_id=row[1], created=row[2], status=row[3],
                   result_json=_loads(row[4]), error=_loads(row[5]), detail=_loads(row[6]),
                   summary=_loads(row[7]))

    def runs(self, project_id: str) -> list[Run]:
        """Every run of a project, oldest first (without the full result dumps)."""
        if not is_valid_id(project_id):
            return []
        with self._read() as db:
            rows = db.execute(
                "SELECT id, project_id, created, status, result, error, summary FROM runs "
                "WHERE project_id = ? ORDER BY id",
                (project_id,),
            ).fetchall()
        return [Run(id=r[0], project_id=r[1], created=r[2], status=r[3],
                    result_json=_loads(r[4]), error=_loads(r[5]), summary=_loads(r[6]))
                for r in rows]


def _loads(text: str | None) -> dict[str, Any] | None:
    return None if text is None else json.loads(text)


def _result_from_detail(data: dict[str, Any]) -> AdjustmentResult:
    """Rebuild the frozen result from ``dataclasses.asdict`` output."""
    summary = dict(data["summary"])
    test = summary.get("global_test")
    summary["global_test"] = None if test is None else GlobalTest(**test)
    points = tuple(
        PointResult(**{**p, "ellipse": None if p["ellipse"] is None else Ellipse(**p["ellipse"])})
        for p in data["points"]
    )
    return AdjustmentResult(**{
        **data,
        "summary": Summary(**summary),
        "points": points,
        "observations": tuple(ObservationResult(**o) for o in data["observations"]),
        "misclosures": tuple(
            MisclosureResult(**{**m, "points": tuple(m["points"])}) for m in data["misclosures"]
        ),
        "relative": tuple(RelativeResult(**r) for r in data["relative"]),
        "warnings": tuple(data["warnings"]),
    })
