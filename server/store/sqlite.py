"""The project store: field books as uploaded, and the runs of their adjustment.

Everything about persistence stays behind ``Store``: one SQLite file on a workstation
(the default), or a PostgreSQL database for a team (``Store("postgresql://…")``); the
same SQL, schema and migrations serve both (``server/store/backends.py``,
``server/store/schema.py``).  A ``Store`` is safe to share between threads; every
write is one transaction.  The field
book is kept byte for byte as uploaded (even when it is not valid UTF-8), so
nothing the surveyor sent is lost.

A finished run keeps three JSON documents: the contract JSON
(``AdjustmentResult.to_json_dict()``), which the API serves unchanged; a full
dump of the result object, from which the pages and reports are rebuilt
without adjusting again; and a small summary for project lists.  The two
large ones are stored zlib-compressed (BLOBs); runs stored before that keep
their JSON text and are read as they are.  Edited field books are never
stored: they are the upload with the run's decisions written in.

Every run also keeps its settings (``{"edits": [...]}``: the surveyor's
decisions in force, each a JSON object).  A re-run is stored as ``running``
first and finished in one later transaction, so a run interrupted by a crash
stays marked as not finished and never touches the runs before it; the
service's next start stores it as ``interrupted`` (``Store.mark_interrupted``),
and the surveyor can re-run it with the same decisions.
Decisions queued for the next re-run are kept in ``pending_edits``.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import re
import secrets
import uuid
import zlib
from collections.abc import Collection, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import orjson

from server.errors import FieldbookError, NetworkError
from server.results.columns import ObservationColumns
from server.results.json_writer import json_bytes
from server.results.types import (
    AdjustmentResult,
    BaselineTestResult,
    Ellipse,
    GlobalTest,
    MisclosureResult,
    ObservationResult,
    PointResult,
    RelativeHeightResult,
    RelativeResult,
    Summary,
)
from server.store import schema
from server.store.backends import (
    PostgresBackend,
    SqliteBackend,
    Transaction,
    is_database_url,
)
from server.store.schema import upgrade_postgresql, upgrade_sqlite

#: The schema this program writes (``server/store/schema.py`` holds its migrations).
SCHEMA_VERSION = schema.SCHEMA_VERSION
_ID_RE = re.compile(r"^[0-9a-f]{32}$")
#: Settings of a run made without any decision (an upload as it is).
NO_EDITS: dict[str, Any] = {"edits": []}

#: Runs a stopped service left ``running``: what is stored for them once found.
INTERRUPTED_ERROR = {
    "kind": "interrupted",
    "message": "The service stopped before this run finished, so it has no result.",
}


def is_valid_id(value: str) -> bool:
    """True for a well-formed project id (32 lower-case hex digits)."""
    return bool(_ID_RE.match(value))


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


@dataclass(frozen=True, slots=True)
class Actor:
    """Who acts on the store: an account (``user_id``, name, role), or the workstation's one
    user (no accounts: ``user_id`` None).  Written beside runs, decisions and approvals."""

    user_id: int | None
    name: str
    role: str

    @property
    def label(self) -> str:
        """The name the review trail shows."""
        return self.name or "the workstation user"


#: The single user of a service without accounts.
WORKSTATION = Actor(None, "", "workstation")

#: Projects an account may see: its own, those shared with it or with the whole office, and
#: those stored before accounts (no owner).  Parameters: the account's id, twice.
_VISIBLE = (
    "(p.owner_id IS NULL OR p.owner_id = ? OR p.shared_with_office = 1 OR EXISTS "
    "(SELECT 1 FROM project_shares s WHERE s.project_id = p.id AND s.user_id = ?))"
)


def _visibility(viewer: Actor | None) -> tuple[str, tuple[Any, ...]]:
    """(`` AND condition``, parameters) limiting a query over ``projects p`` to ``viewer``."""
    if viewer is None or viewer == WORKSTATION:
        return "", ()
    if viewer.user_id is None:  # no account (signed out): nothing at all
        return " AND 0", ()
    return " AND " + _VISIBLE, (viewer.user_id, viewer.user_id)


def _trail(
    db: Transaction,
    project_id: str,
    actor: Actor | None,
    event: str,
    detail: str = "",
    run_id: int | None = None,
) -> None:
    """One line of a project's review trail, in the caller's transaction."""
    who = actor or WORKSTATION
    db.execute(
        "INSERT INTO trail (project_id, created, actor, role, event, run_id, detail) "
        "VALUES (?, ?, ?, ?, ?, ?, ?)",
        (project_id, _now(), who.name, who.role, event, run_id, detail[:500]),
    )


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
    #: The contract JSON as stored (zlib BLOB or text), read on first use of ``result_json``:
    #: the pages rebuild the result from ``detail`` and never need it.
    result_dump: str | bytes | None
    error: dict[str, Any] | None
    detail: dict[str, Any] | None = None
    summary: dict[str, Any] | None = None
    settings: dict[str, Any] | None = None
    #: The run's place among its project's runs (1, 2, …): what "Run #" shows.  ``id`` is
    #: unique across projects and stays the run's address in URLs and the API.
    number: int = 0
    #: The account that started it ('' on the workstation, None before schema 6).
    started_by: str | None = None

    _decoded: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @property
    def finished(self) -> bool:
        """True when the adjustment produced a result."""
        return self.status == "finished"

    @property
    def result_json(self) -> dict[str, Any] | None:
        """The contract JSON of a finished run (None without one, or from ``Store.runs``)."""
        if "result" not in self._decoded:
            self._decoded["result"] = _loads(self.result_dump)
        return self._decoded["result"]  # type: ignore[no-any-return]

    @property
    def edits(self) -> list[dict[str, Any]]:
        """The decisions in force for this run (JSON objects, in the order they were made)."""
        edits = (self.settings or {}).get("edits", [])
        return list(edits) if isinstance(edits, list) else []

    def result(self) -> AdjustmentResult | None:
        """The stored result object, or None if it is missing or from an incompatible version."""
        if self.detail is None:
            return None
        try:
            return _result_from_detail(self.detail)
        except (KeyError, TypeError, ValueError):
            return None


@dataclass(frozen=True, slots=True)
class SourceFile:
    """The file a field book was imported from, byte for byte, with its SHA-256."""

    filename: str
    content: bytes
    sha256: str


@dataclass(frozen=True, slots=True)
class Project:
    """A stored field book as uploaded (or as imported, with ``source`` the file it came from)."""

    id: str
    name: str
    filename: str
    created: str
    sha256: str
    fieldbook: bytes
    form_token: str = ""
    source: SourceFile | None = None
    #: The owning account (None: stored before accounts, shared with the whole office).
    owner_id: int | None = None
    owner: str = ""
    shared_with_office: bool = False

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
    owner: str = ""


@dataclass(frozen=True, slots=True)
class PendingEdit:
    """A decision queued for the next re-run of a project."""

    id: int
    project_id: str
    created: str
    edit: dict[str, Any]
    #: The account that queued it ('' on the workstation, None before schema 6).
    proposed_by: str | None = None


def error_record(error: BaseException | str) -> dict[str, Any]:
    """The JSON form of a failed run's error, keeping line numbers and point names."""
    if isinstance(error, FieldbookError):
        return {
            "kind": "fieldbook",
            "message": error.headline,
            "count": error.count,
            "issues": [
                {"line": i.line, "token": i.token, "message": i.message} for i in error.issues
            ],
        }
    if isinstance(error, NetworkError):
        return {"kind": "network", "message": error.message, "points": list(error.points)}
    return {"kind": "other", "message": str(error)}


@dataclass(frozen=True, slots=True)
class DeletedProject:
    """A project deleted but still recoverable: ``deleted`` is when (ISO 8601, UTC)."""

    id: str
    name: str
    filename: str
    deleted: str
    runs: int
    form_token: str


@dataclass(frozen=True, slots=True)
class RunProgress:
    """A worker's run as the progress page shows it; ``ahead`` is None once it has started."""

    run_id: int
    stage: str
    step: int
    started: str | None
    ahead: int | None
    adjusting: int


@dataclass(frozen=True, slots=True)
class Approval:
    """A run approved for issue: by whom, when, and the SHA-256 of the field book it adjusted."""

    run_id: int
    project_id: str
    run_number: int
    approved_by: str
    approved: str
    fieldbook_sha256: str


@dataclass(frozen=True, slots=True)
class TrailEntry:
    """One action on a project: when, who (name and role), what, and on which run."""

    created: str
    actor: str
    role: str
    event: str
    run_id: int | None
    detail: str


class NotApprovable(ValueError):
    """The run cannot be approved (not finished, not the latest, already approved…)."""


class RunGone(LookupError):
    """The run to finish no longer exists: its project was deleted while it was adjusted."""


class RunEnded(ValueError):
    """The run to finish has already ended (finished, failed or interrupted): a second
    attempt at the same run, such as a worker's job retried, stores nothing."""


class DecisionsChanged(RuntimeError):
    """A re-run was refused at commit: the decisions changed while it was adjusting."""


class AlreadyQueued(ValueError):
    """The same decision on the same line is already waiting for the next re-run."""


class Store:
    """Projects and runs in one SQLite file (WAL mode, one connection per call), or in a
    PostgreSQL database when ``location`` is a ``postgresql://`` address."""

    def __init__(self, location: Path | str) -> None:
        self.backend: SqliteBackend | PostgresBackend
        if is_database_url(location):
            self.path: Path | None = None
            self.backend = PostgresBackend(str(location))
        else:
            self.path = Path(location)
            self.backend = SqliteBackend(self.path)
        self.dialect = self.backend.dialect
        self.backend.prepare()
        with self.backend.write() as db:
            self.upgraded_from = self._create_or_upgrade(db)

    @property
    def location(self) -> str:
        """Where the projects are, as the log may name it (no password)."""
        return self.backend.location

    @property
    def postgresql(self) -> bool:
        """True when the projects are in PostgreSQL (workers may adjust on other machines)."""
        return isinstance(self.backend, PostgresBackend)

    def close(self) -> None:
        """Let go of kept connections (PostgreSQL); the store stays usable."""
        self.backend.close()

    def _create_or_upgrade(self, db: Transaction) -> int:
        """Create the schema, or bring an older one up to date (inside the caller's
        transaction); the version found (0: a new database)."""
        if isinstance(self.backend, PostgresBackend):
            return upgrade_postgresql(db, self.location, _now())
        return upgrade_sqlite(db, str(self.path))

    # -- connections -----------------------------------------------------------------

    @contextmanager
    def _write(self) -> Iterator[Transaction]:
        """One transaction: committed on success, rolled back on error."""
        with self.backend.write() as db:
            yield db

    @contextmanager
    def _read(self) -> Iterator[Transaction]:
        with self.backend.read() as db:
            yield db

    # -- projects --------------------------------------------------------------------

    def create_project(
        self,
        name: str,
        filename: str,
        fieldbook: str | bytes,
        source: tuple[str, bytes] | None = None,
        *,
        owner: Actor | None = None,
    ) -> str:
        """Store a field book unchanged (and the ``(filename, bytes)`` it was imported from,
        in the same transaction); returns the new project's id.  ``owner`` (an account)
        owns it; without one it is the workstation's (or the whole office's)."""
        raw = fieldbook.encode("utf-8") if isinstance(fieldbook, str) else bytes(fieldbook)
        project_id = uuid.uuid4().hex
        with self._write() as db:
            db.execute(
                "INSERT INTO projects (id, name, filename, created, fieldbook, sha256, form_token, "
                "owner_id) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    project_id,
                    name,
                    filename,
                    _now(),
                    raw,
                    hashlib.sha256(raw).hexdigest(),
                    secrets.token_hex(16),
                    owner.user_id if owner is not None else None,
                ),
            )
            _trail(db, project_id, owner, "created", filename or name)
            if source is not None:
                content = bytes(source[1])
                db.execute(
                    "INSERT INTO source_files (project_id, filename, content, sha256) "
                    "VALUES (?, ?, ?, ?)",
                    (project_id, source[0], content, hashlib.sha256(content).hexdigest()),
                )
        return project_id

    def get_project(
        self, project_id: str, *, deleted: bool = False, visible_to: Actor | None = None
    ) -> Project | None:
        """The project with its field book, or None (``deleted``: a deleted one instead).

        With ``visible_to`` (an account), None also when that account may not see it.
        """
        if not is_valid_id(project_id):
            return None
        condition, parameters = _visibility(visible_to)
        with self._read() as db:
            row = db.execute(  # the condition is a constant of this module
                "SELECT p.id, p.name, p.filename, p.created, p.sha256, p.fieldbook, "  # noqa: S608
                "p.form_token, s.filename, s.content, s.sha256, p.owner_id, "
                "(SELECT name FROM users WHERE id = p.owner_id), p.shared_with_office "
                "FROM projects p LEFT JOIN source_files s ON s.project_id = p.id "
                "WHERE p.id = ? AND p.deleted IS "
                + ("NOT NULL" if deleted else "NULL")
                + condition,
                (project_id, *parameters),
            ).fetchone()
        if row is None:
            return None
        source = None if row[8] is None else SourceFile(row[7], bytes(row[8]), row[9])
        return Project(
            id=row[0],
            name=row[1],
            filename=row[2],
            created=row[3],
            sha256=row[4],
            fieldbook=bytes(row[5]),
            form_token=row[6],
            source=source,
            owner_id=row[10],
            owner=row[11] or "",
            shared_with_office=bool(row[12]),
        )

    def list_projects(self, visible_to: Actor | None = None) -> list[ProjectListing]:
        """All projects (those ``visible_to`` may see), newest first, with their latest run's
        summary (no books, no results)."""
        condition, parameters = _visibility(visible_to)
        with self._read() as db:
            rows = db.execute(  # _COMPLETED and the condition are constants of this module
                "SELECT p.id, p.name, p.filename, p.created, p.sha256, "  # noqa: S608
                "r.id, r.created, r.status, r.summary, r.error, "
                "(SELECT COUNT(*) FROM runs n WHERE n.project_id = p.id AND n.id <= r.id), "
                "(SELECT name FROM users WHERE id = p.owner_id) "
                "FROM projects p LEFT JOIN runs r ON r.id = "
                "(SELECT MAX(id) FROM runs WHERE project_id = p.id AND " + _COMPLETED + ") "
                "WHERE p.deleted IS NULL" + condition + " "
                f"ORDER BY p.created DESC, p.{self.dialect.row_order} DESC",
                parameters,
            ).fetchall()
        listings = []
        for row in rows:
            latest = None
            if row[5] is not None:
                latest = Run(
                    id=row[5],
                    project_id=row[0],
                    created=row[6],
                    status=row[7],
                    result_dump=None,
                    error=_loads(row[9]),
                    summary=_loads(row[8]),
                    number=row[10],
                )
            listings.append(
                ProjectListing(
                    id=row[0],
                    name=row[1],
                    filename=row[2],
                    created=row[3],
                    sha256=row[4],
                    latest=latest,
                    owner=row[11] or "",
                )
            )
        return listings

    def delete_project(self, project_id: str, *, actor: Actor | None = None) -> bool:
        """Mark a project deleted (kept for ``restore_project`` until purged); True if live."""
        if not is_valid_id(project_id):
            return False
        with self._write() as db:
            cursor = db.execute(
                "UPDATE projects SET deleted = ? WHERE id = ? AND deleted IS NULL",
                (_now(), project_id),
            )
            if cursor.rowcount > 0:
                _trail(db, project_id, actor, "deleted")
        return int(cursor.rowcount) > 0

    def deleted_projects(self, visible_to: Actor | None = None) -> list[DeletedProject]:
        """Projects deleted but not yet purged (those ``visible_to`` may see), most recently
        deleted first."""
        condition, parameters = _visibility(visible_to)
        with self._read() as db:
            rows = db.execute(  # the condition is a constant of this module
                "SELECT p.id, p.name, p.filename, p.deleted, "  # noqa: S608
                "(SELECT COUNT(*) FROM runs WHERE project_id = p.id), p.form_token "
                "FROM projects p WHERE p.deleted IS NOT NULL" + condition + " "
                f"ORDER BY p.deleted DESC, p.{self.dialect.row_order} DESC",
                parameters,
            ).fetchall()
        return [
            DeletedProject(
                id=r[0], name=r[1], filename=r[2], deleted=r[3], runs=r[4], form_token=r[5]
            )
            for r in rows
        ]

    def restore_project(self, project_id: str, *, actor: Actor | None = None) -> bool:
        """Bring a deleted project back with its runs; True if it was deleted."""
        if not is_valid_id(project_id):
            return False
        with self._write() as db:
            cursor = db.execute(
                "UPDATE projects SET deleted = NULL WHERE id = ? AND deleted IS NOT NULL",
                (project_id,),
            )
            if cursor.rowcount > 0:
                _trail(db, project_id, actor, "restored")
        return int(cursor.rowcount) > 0

    def purge_deleted(self, keep_days: int, *, now: datetime | None = None) -> list[DeletedProject]:
        """Remove for good the projects deleted ``keep_days`` days ago or earlier; returns them."""
        cutoff = ((now or datetime.now(UTC)) - timedelta(days=keep_days)).isoformat(
            timespec="seconds"
        )
        candidates = [p for p in self.deleted_projects() if p.deleted <= cutoff]
        gone = []
        with self._write() as db:
            for project in candidates:
                # checked again in the transaction: one restored meanwhile stays
                erased = db.execute(
                    "DELETE FROM projects WHERE id = ? AND deleted IS NOT NULL AND deleted <= ? "
                    "RETURNING id",
                    (project.id, cutoff),
                ).fetchone()
                if erased is not None:
                    gone.append(project)
        return gone

    # -- runs ------------------------------------------------------------------------

    def add_run(
        self,
        project_id: str,
        result: AdjustmentResult | None = None,
        error: BaseException | str | None = None,
        *,
        settings: dict[str, Any] | None = None,
        by: Actor | None = None,
    ) -> int:
        """Record an adjustment: finished with ``result``, or failed with ``error``."""
        outcome = _outcome(result, error)
        with self._write() as db:
            db.lock_project(project_id)  # runs of one project are numbered in commit order
            (run_id,) = db.execute(
                "INSERT INTO runs (project_id, created, status, result, detail, summary, error, "
                "settings, started_by) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?) RETURNING id",
                (
                    project_id,
                    _now(),
                    *outcome,
                    json.dumps(settings or NO_EDITS),
                    (by or WORKSTATION).name,
                ),
            ).fetchone()
            _trail_run(db, project_id, by, run_id)
        return int(run_id)

    def start_run(
        self, project_id: str, settings: dict[str, Any], *, by: Actor | None = None
    ) -> int:
        """Record a run as ``running`` before adjusting; ``finish_run`` completes it."""
        with self._write() as db:
            db.lock_project(project_id)  # runs of one project are numbered in commit order
            (run_id,) = db.execute(
                "INSERT INTO runs (project_id, created, status, settings, started_by) "
                "VALUES (?, ?, 'running', ?, ?) RETURNING id",
                (project_id, _now(), json.dumps(settings), (by or WORKSTATION).name),
            ).fetchone()
            _trail_run(db, project_id, by, run_id)
        return int(run_id)

    def finish_run(
        self,
        run_id: int,
        result: AdjustmentResult | None = None,
        error: BaseException | str | None = None,
        *,
        consumed: tuple[int, ...] | None = None,
    ) -> None:
        """Complete a running run and drop the pending decisions it used, in one transaction.

        ``consumed`` is the queue the run was started with.  A finished re-run commits only
        if that queue is still exactly the project's queue and no other run finished since
        the one it was based on; otherwise the run is discarded and ``DecisionsChanged``
        raised, so a decision undone or added meanwhile is never silently ignored.
        """
        outcome = _outcome(result, error)
        change = ""
        gone = False
        with self._write() as db:
            owner = db.execute("SELECT project_id FROM runs WHERE id = ?", (run_id,)).fetchone()
            # the project's row held first, then the run read again under it: two attempts
            # at finishing the same run (a worker's job retried) commit one outcome
            deleted = None if owner is None else db.lock_project(owner[0])
            row = db.execute(
                "SELECT project_id, status, settings FROM runs WHERE id = ?", (run_id,)
            ).fetchone()
            if row is None:
                raise RunGone(f"run {run_id} no longer exists; its project was deleted")
            if deleted is not None and deleted[0] is not None:
                # Dropped (not left running): a restored project shows no orphan run.
                db.execute("DELETE FROM runs WHERE id = ?", (run_id,))
                gone = True
            elif row[1] != "running":
                raise RunEnded(f"run {run_id} is not running")
            project_id = row[0]
            if not gone and result is not None and consumed is not None:
                change = _queue_change(db, project_id, run_id, _loads(row[2]) or {}, consumed)
            if gone:
                pass
            elif change:  # discarded, so it does not stay behind as an interrupted run
                db.execute("DELETE FROM runs WHERE id = ?", (run_id,))
            else:
                db.execute(
                    "UPDATE runs SET status = ?, result = ?, detail = ?, summary = ?, error = ? "
                    "WHERE id = ?",
                    (*outcome, run_id),
                )
                for edit_id in consumed or ():
                    db.execute(
                        "DELETE FROM pending_edits WHERE id = ? AND project_id = ?",
                        (edit_id, project_id),
                    )
        if gone:
            raise RunGone(f"run {run_id} was dropped: its project was deleted")
        if change:
            raise DecisionsChanged(
                f"The decisions changed while this re-run was adjusting ({change}); "
                "nothing was stored. Check the decisions and re-run again."
            )

    def mark_interrupted(self, keep: Collection[int] = ()) -> list[int]:
        """Store every run left ``running`` as ``interrupted``, except those in ``keep``;
        returns their ids.

        Call only when no process is adjusting on this data folder (at start-up): a run
        is ``running`` between ``start_run`` and ``finish_run`` of one live process.  With
        workers (PostgreSQL), ``keep`` holds the runs the task queue still has.
        """
        kept = set(keep)
        with self._write() as db:
            ids = [
                row[0]
                for row in db.execute("SELECT id FROM runs WHERE status = 'running' ORDER BY id")
                if row[0] not in kept
            ]
            for run_id in ids:
                db.execute(
                    "UPDATE runs SET status = 'interrupted', error = ? "
                    "WHERE id = ? AND status = 'running'",
                    (json.dumps(INTERRUPTED_ERROR), run_id),
                )
        return ids

    def interrupt_run(self, run_id: int, message: str) -> bool:
        """Store one running run as ``interrupted`` with ``message``; True if it was running.

        For a run whose adjustment keeps stopping its worker (the queue gave up on it):
        the project's page then offers the re-run as for any interrupted run.
        """
        error = {**INTERRUPTED_ERROR, "message": message}
        with self._write() as db:
            cursor = db.execute(
                "UPDATE runs SET status = 'interrupted', error = ? "
                "WHERE id = ? AND status = 'running'",
                (json.dumps(error), run_id),
            )
        return bool(cursor.rowcount)

    def run_status(self, run_id: int) -> tuple[str, str] | None:
        """(project id, status) of a run by its id alone, or None when it does not exist."""
        with self._read() as db:
            row = db.execute(
                "SELECT project_id, status FROM runs WHERE id = ?", (run_id,)
            ).fetchone()
        return None if row is None else (row[0], row[1])

    # -- progress of runs adjusted by workers -----------------------------------------

    def set_progress(self, run_id: int, stage: str, step: int) -> None:
        """Record the stage a worker's adjustment of ``run_id`` has reached (pages read it)."""
        now = _now()
        with self._write() as db:
            db.execute(
                "INSERT INTO run_progress (run_id, stage, step, started, updated) "
                "VALUES (?, ?, ?, ?, ?) ON CONFLICT (run_id) DO UPDATE SET "
                "stage = excluded.stage, step = excluded.step, updated = excluded.updated",
                (run_id, stage, step, now, now),
            )

    def progress(self, run_id: int) -> RunProgress:
        """Where a running run is: its stage (``queued`` until a worker has taken it), and
        the runs waiting ahead of it and being adjusted, read from the database."""
        with self._read() as db:
            row = db.execute(
                "SELECT stage, step, started FROM run_progress WHERE run_id = ?", (run_id,)
            ).fetchone()
            waiting, adjusting = db.execute(
                "SELECT "
                "COALESCE(SUM(CASE WHEN g.run_id IS NULL AND r.id < ? THEN 1 ELSE 0 END), 0), "
                "COALESCE(SUM(CASE WHEN g.run_id IS NULL THEN 0 ELSE 1 END), 0) "
                "FROM runs r LEFT JOIN run_progress g ON g.run_id = r.id "
                "WHERE r.status = 'running'",
                (run_id,),
            ).fetchone()
        if row is None:
            return RunProgress(run_id, "queued", 0, None, int(waiting), int(adjusting))
        return RunProgress(run_id, row[0], int(row[1]), row[2], None, int(adjusting))

    def waiting_runs(self) -> int:
        """Runs stored as ``running`` that no worker has taken yet."""
        with self._read() as db:
            (count,) = db.execute(
                "SELECT COUNT(*) FROM runs r WHERE r.status = 'running' AND NOT EXISTS "
                "(SELECT 1 FROM run_progress g WHERE g.run_id = r.id)"
            ).fetchone()
        return int(count)

    def latest_run(self, project_id: str, *, finished: bool = False) -> Run | None:
        """The most recent completed run (or finished one) with its full result dump, or None.

        A run marked ``running`` (in progress, or interrupted before a restart found it)
        or ``interrupted`` is never the latest: it has no result and no error of its own.
        """
        if not is_valid_id(project_id):
            return None
        status = "status = 'finished'" if finished else _COMPLETED
        with self._read() as db:
            row = db.execute(
                # both pieces are constants of this module; values go in as parameters
                f"SELECT {_RUN_COLUMNS} FROM runs WHERE project_id = ? AND {status} "  # noqa: S608
                "ORDER BY id DESC LIMIT 1",
                (project_id,),
            ).fetchone()
        return None if row is None else _run(row)

    def run(self, project_id: str, run_id: int) -> Run | None:
        """One run of a project with its full result dump, or None."""
        if not is_valid_id(project_id):
            return None
        with self._read() as db:
            row = db.execute(
                f"SELECT {_RUN_COLUMNS} FROM runs WHERE project_id = ? AND id = ?",  # noqa: S608
                (project_id, run_id),
            ).fetchone()
        return None if row is None else _run(row)

    def runs(self, project_id: str) -> list[Run]:
        """Every run of a project, oldest first, without the full result dumps
        (``result_json`` and ``detail`` are None: ``run`` reads one run in full)."""
        if not is_valid_id(project_id):
            return []
        with self._read() as db:
            rows = db.execute(
                "SELECT id, project_id, created, status, error, summary, settings, "
                "started_by FROM runs WHERE project_id = ? ORDER BY id",
                (project_id,),
            ).fetchall()
        return [
            Run(
                id=r[0],
                project_id=r[1],
                created=r[2],
                status=r[3],
                result_dump=None,
                error=_loads(r[4]),
                summary=_loads(r[5]),
                settings=_loads(r[6]),
                number=number,
                started_by=r[7],
            )
            for number, r in enumerate(rows, start=1)
        ]

    # -- decisions waiting for a re-run ---------------------------------------------

    def add_pending_edit(
        self,
        project_id: str,
        edit: dict[str, Any],
        *,
        based_on: int | None = None,
        by: Actor | None = None,
    ) -> int:
        """Queue a decision (a JSON object) for the project's next re-run.

        Checked and inserted in one transaction: ``AlreadyQueued`` when the same decision
        on the same line is already waiting (two clients leaving out the same line give
        one decision), ``DecisionsChanged`` when ``based_on`` is given and is no longer the
        project's latest finished run (the decision was checked against an older state).
        """
        key = _decision_key(edit)
        with self._write() as db:
            db.lock_project(project_id)
            if based_on is not None:
                (latest,) = db.execute(
                    "SELECT MAX(id) FROM runs WHERE project_id = ? AND status = 'finished'",
                    (project_id,),
                ).fetchone()
                if latest != based_on:
                    raise DecisionsChanged(
                        "A re-run finished while this decision was made; "
                        "reload the page and decide again on the new run."
                    )
            for (text,) in db.execute(
                "SELECT edit FROM pending_edits WHERE project_id = ?", (project_id,)
            ):
                if _decision_key(json.loads(text)) == key:
                    where = f"line {edit['line']}: t" if edit.get("line") else "T"
                    raise AlreadyQueued(
                        f"{where}he same decision is already queued for the next re-run."
                    )
            (edit_id,) = db.execute(
                "INSERT INTO pending_edits (project_id, created, edit, proposed_by) "
                "VALUES (?, ?, ?, ?) RETURNING id",
                (project_id, _now(), json.dumps(edit), (by or WORKSTATION).name),
            ).fetchone()
            _trail(db, project_id, by, "proposed", _decision_words(edit), based_on)
        return int(edit_id)

    def pending_edits(self, project_id: str) -> list[PendingEdit]:
        """The project's queued decisions, oldest first."""
        if not is_valid_id(project_id):
            return []
        with self._read() as db:
            rows = db.execute(
                "SELECT id, project_id, created, edit, proposed_by FROM pending_edits "
                "WHERE project_id = ? ORDER BY id",
                (project_id,),
            ).fetchall()
        return [
            PendingEdit(
                id=r[0], project_id=r[1], created=r[2], edit=json.loads(r[3]), proposed_by=r[4]
            )
            for r in rows
        ]

    def remove_pending_edit(
        self, project_id: str, edit_id: int, *, by: Actor | None = None, only_by: str | None = None
    ) -> bool:
        """Withdraw one queued decision; True if it was there (and, with ``only_by``, queued
        by that account: a technician withdraws only their own proposals)."""
        if not is_valid_id(project_id):
            return False
        with self._write() as db:
            db.lock_project(project_id)  # not between a re-run's check of the queue and its commit
            row = db.execute(
                "SELECT edit, proposed_by FROM pending_edits WHERE id = ? AND project_id = ?",
                (edit_id, project_id),
            ).fetchone()
            if row is None or (only_by is not None and (row[1] or "").lower() != only_by.lower()):
                return False
            db.execute("DELETE FROM pending_edits WHERE id = ?", (edit_id,))
            _trail(db, project_id, by, "withdrawn", _decision_words(json.loads(row[0])))
        return True

    # -- approval, sharing and the review trail ---------------------------------------

    def approve_run(self, project_id: str, run_id: int, by: Actor) -> Approval:
        """Approve a finished run for issue; it is frozen from then on (schema 6's trigger).

        Only the project's latest finished run, with no decision queued after it, may be
        approved, and only once: ``NotApprovable`` says why not.
        """
        with self._write() as db:
            db.lock_project(project_id)  # checked against the queue and the runs as they stand
            row = db.execute(
                f"SELECT {_RUN_COLUMNS} FROM runs WHERE project_id = ? AND id = ?",  # noqa: S608
                (project_id, run_id),
            ).fetchone()
            if row is None or row[3] != "finished":
                raise NotApprovable("Only a run that finished with a result can be approved.")
            (latest,) = db.execute(
                "SELECT MAX(id) FROM runs WHERE project_id = ? AND status = 'finished'",
                (project_id,),
            ).fetchone()
            if latest != run_id:
                raise NotApprovable(
                    "A later run has finished; approve the latest run, or review it first."
                )
            if db.execute("SELECT 1 FROM approvals WHERE run_id = ?", (run_id,)).fetchone():
                raise NotApprovable(f"Run #{row[9]} is already approved; it stays as it is.")
            if db.execute(
                "SELECT 1 FROM pending_edits WHERE project_id = ?", (project_id,)
            ).fetchone():
                raise NotApprovable(
                    "Decisions are queued for a next run: re-run with them or withdraw them "
                    "before approving, so that what is approved is what was reviewed."
                )
            detail = _loads(row[6]) or {}  # the full result: the hash of the text it adjusted
            sha = str(detail.get("text_sha256") or "")
            if not sha:
                (sha,) = db.execute(
                    "SELECT sha256 FROM projects WHERE id = ?", (project_id,)
                ).fetchone()
            approval = Approval(run_id, project_id, row[9], by.name, _now(), sha)
            db.execute(
                "INSERT INTO approvals (run_id, project_id, run_number, approved_by, user_id, "
                "approved, fieldbook_sha256) VALUES (?, ?, ?, ?, ?, ?, ?)",
                (
                    run_id,
                    project_id,
                    approval.run_number,
                    by.name,
                    by.user_id,
                    approval.approved,
                    sha,
                ),
            )
            _trail(db, project_id, by, "approved", f"run #{approval.run_number}", run_id)
        return approval

    def approvals(self, project_id: str) -> dict[int, Approval]:
        """The project's approved runs by run id."""
        if not is_valid_id(project_id):
            return {}
        with self._read() as db:
            rows = db.execute(
                "SELECT run_id, project_id, run_number, approved_by, approved, fieldbook_sha256 "
                "FROM approvals WHERE project_id = ? ORDER BY run_id",
                (project_id,),
            ).fetchall()
        return {r[0]: Approval(*r) for r in rows}

    def trail(self, project_id: str) -> list[TrailEntry]:
        """Everything done to a project, oldest first."""
        if not is_valid_id(project_id):
            return []
        with self._read() as db:
            rows = db.execute(
                "SELECT created, actor, role, event, run_id, detail FROM trail "
                "WHERE project_id = ? ORDER BY id",
                (project_id,),
            ).fetchall()
        return [TrailEntry(*r) for r in rows]

    def shares(self, project_id: str) -> list[str]:
        """Names of the accounts a project is shared with, by name."""
        with self._read() as db:
            rows = db.execute(
                "SELECT u.name FROM project_shares s JOIN users u ON u.id = s.user_id "
                "WHERE s.project_id = ? ORDER BY lower(u.name)",
                (project_id,),
            ).fetchall()
        return [r[0] for r in rows]

    def set_sharing(
        self, project_id: str, office: bool, names: list[str], *, by: Actor | None = None
    ) -> list[str]:
        """Share a project with the whole office or not, and with exactly the accounts
        ``names``; returns the names that are no account (nothing changed then)."""
        with self._write() as db:
            ids, unknown = [], []
            for name in names:
                row = db.execute(  # names are one whatever their letter case
                    "SELECT id FROM users WHERE lower(name) = lower(?)", (name,)
                ).fetchone()
                if row is None:
                    unknown.append(name)
                else:
                    ids.append(row[0])
            if unknown:
                return unknown
            db.execute(
                "UPDATE projects SET shared_with_office = ? WHERE id = ?", (int(office), project_id)
            )
            db.execute("DELETE FROM project_shares WHERE project_id = ?", (project_id,))
            for user_id in dict.fromkeys(ids):
                db.execute(
                    "INSERT INTO project_shares (project_id, user_id) VALUES (?, ?)",
                    (project_id, user_id),
                )
            who = ", ".join(names) or "no one by name"
            detail = f"the whole office and {who}" if office else who
            _trail(db, project_id, by, "shared", detail)
        return []

    # -- for the accounts module: the same one-transaction connections ---------------

    def writing(self) -> contextlib.AbstractContextManager[Transaction]:
        """One write transaction (``server.store.accounts`` keeps its tables with it)."""
        return self._write()

    def reading(self) -> contextlib.AbstractContextManager[Transaction]:
        """One read connection."""
        return self._read()


#: Runs that ended with a result or an error (not in progress, not interrupted).
_COMPLETED = "status IN ('finished', 'failed')"

_RUN_COLUMNS = (
    "id, project_id, created, status, result, error, detail, summary, settings, "
    "(SELECT COUNT(*) FROM runs n WHERE n.project_id = runs.project_id AND n.id <= runs.id), "
    "started_by"
)


def _trail_run(db: Transaction, project_id: str, by: Actor | None, run_id: int) -> None:
    """The trail's line for a run just stored: its number, who started it and how many
    decisions it applies."""
    (number, settings) = db.execute(
        "SELECT (SELECT COUNT(*) FROM runs WHERE project_id = ? AND id <= ?), settings "
        "FROM runs WHERE id = ?",
        (project_id, run_id, run_id),
    ).fetchone()
    edits = (_loads(settings) or {}).get("edits") or []
    count = len(edits) if isinstance(edits, list) else 0
    decisions = f" with {count} decision{'s' if count != 1 else ''} in force" if count else ""
    _trail(db, project_id, by, "run", f"run #{number}{decisions}", run_id)


def _decision_words(edit: Any) -> str:
    """A queued decision in a few words for the trail: its line, action and reason."""
    if not isinstance(edit, dict):
        return ""
    where = f"line {edit['line']}" if edit.get("line") else "relative pairs"
    reason = str(edit.get("reason") or "")
    return f"{where}: {edit.get('action', '')}" + (f" ({reason})" if reason else "")


def _decision_key(edit: Any) -> tuple[Any, ...]:
    """What makes two decisions the same (who wrote it, why and when do not)."""
    if not isinstance(edit, dict):
        return (repr(edit),)
    return tuple(
        json.dumps(edit.get(k), sort_keys=True) for k in ("line", "action", "sd", "value", "pairs")
    )


def _queue_change(
    db: Transaction,
    project_id: str,
    run_id: int,
    settings: dict[str, Any],
    consumed: tuple[int, ...],
) -> str:
    """Why a re-run started with queue ``consumed`` may no longer commit ('' when it may)."""
    queued = {
        r[0] for r in db.execute("SELECT id FROM pending_edits WHERE project_id = ?", (project_id,))
    }
    if set(consumed) - queued:
        return "a decision it used was undone or applied by another re-run"
    if queued - set(consumed):
        return "a decision was queued after it started"
    based_on = settings.get("based_on")
    if based_on is not None:
        (latest,) = db.execute(
            "SELECT MAX(id) FROM runs WHERE project_id = ? AND status = 'finished' AND id != ?",
            (project_id, run_id),
        ).fetchone()
        if latest != based_on:
            return "another re-run finished first"
    return ""


def _run(row: tuple[Any, ...]) -> Run:
    """A ``Run`` from a row selected with ``_RUN_COLUMNS``."""
    return Run(
        id=row[0],
        project_id=row[1],
        created=row[2],
        status=row[3],
        result_dump=row[4],
        error=_loads(row[5]),
        detail=_loads(row[6]),
        summary=_loads(row[7]),
        settings=_loads(row[8]),
        number=row[9],
        started_by=row[10],
    )


def _outcome(
    result: AdjustmentResult | None, error: BaseException | str | None
) -> tuple[str, bytes | None, bytes | None, str | None, str | None]:
    """(status, result, detail, summary, error) columns of a finished or failed run."""
    if (result is None) == (error is None):
        raise ValueError("give exactly one of result and error")
    if result is None:
        assert error is not None
        return "failed", None, None, None, json.dumps(error_record(error))
    contract = result.to_json_dict()
    summary = dict(contract["summary"])  # type: ignore[call-overload]
    summary["flagged"], summary["uncontrolled"] = _counts(result.observations)
    return (
        "finished",
        _pack(contract),
        _pack(result.detail_dict()),
        json.dumps(summary),
        None,
    )


def _counts(observations: Sequence[ObservationResult]) -> tuple[int, int]:
    """How many observations are flagged, and how many are used but untested (w null: the
    list never shows those as a plain pass)."""
    if isinstance(observations, ObservationColumns):  # from the arrays: no record is made
        untested = ~observations.ignored & observations.used & ~observations.tested
        return int(np.count_nonzero(observations.flagged)), int(np.count_nonzero(untested))
    flagged = sum(1 for o in observations if o.flagged)
    untested_count = sum(
        1 for o in observations if not o.ignored and o.redundancy is not None and o.w is None
    )
    return flagged, untested_count


def _pack(data: dict[str, Any]) -> bytes:
    """A large JSON document stored compactly: zlib-compressed UTF-8, kept as a BLOB.

    Results are mostly numbers and repeated keys; compressed they take about a quarter
    of the space (the typical project's contract: 590 KB as text, 163 KB compressed).
    orjson and zlib's fastest level: storing that run took 60 ms with the standard
    library's encoder and level 6, three times its adjustment, for blobs 13 % smaller
    (141 KB). A value JSON cannot spell (NaN, infinity), which orjson would
    write as null, goes through the standard library as before.
    """
    try:
        text = json_bytes(data, compact=True)
    except (ValueError, TypeError):  # non-finite numbers, or keys orjson does not write
        text = json.dumps(data, separators=(",", ":")).encode("utf-8")
    return zlib.compress(text, 1)


def _loads(value: str | bytes | None) -> dict[str, Any] | None:
    """A stored JSON column: text (summaries, settings, runs stored before compression)
    or a zlib BLOB written by ``_pack``; the storage type tells them apart."""
    if value is None:
        return None
    if isinstance(value, bytes):
        value = zlib.decompress(value)
    try:  # orjson reads a run's dump in a third of the time; a NaN written by json.dumps
        return orjson.loads(value)  # type: ignore[no-any-return]
    except orjson.JSONDecodeError:  # (never in a result, which refuses non-finite numbers)
        return json.loads(value)  # type: ignore[no-any-return]


def _result_from_detail(data: dict[str, Any]) -> AdjustmentResult:
    """Rebuild the frozen result from ``dataclasses.asdict`` output."""
    summary = dict(data["summary"])
    test = summary.get("global_test")
    summary["global_test"] = None if test is None else GlobalTest(**test)
    points = tuple(
        PointResult(**{**p, "ellipse": None if p["ellipse"] is None else Ellipse(**p["ellipse"])})
        for p in data["points"]
    )
    return AdjustmentResult(
        **{
            **data,
            "summary": Summary(**summary),
            "points": points,
            "observations": tuple(
                ObservationResult(**{**o, "inseparable": tuple(o.get("inseparable", ()))})
                for o in data["observations"]
            ),
            "misclosures": tuple(
                MisclosureResult(**{**m, "points": tuple(m["points"])}) for m in data["misclosures"]
            ),
            "relative": tuple(RelativeResult(**r) for r in data["relative"]),
            "relative_heights": tuple(
                RelativeHeightResult(**h) for h in data.get("relative_heights", ())
            ),
            "warnings": tuple(data["warnings"]),
            # results stored before the geodetic model have no baseline tests
            "baseline_tests": tuple(
                BaselineTestResult(**t) for t in data.get("baseline_tests", ())
            ),
        }
    )
