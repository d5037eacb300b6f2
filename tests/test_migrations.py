"""The store's versioned migrations (server/store/schema.py) on SQLite and PostgreSQL.

Up from an empty database, up from the previous schema with data in it, the same tables
and columns either way, one transaction per upgrade (a failing step changes nothing), and
PostgreSQL databases opened by several processes at once upgraded once.
"""

from __future__ import annotations

import sqlite3
import threading
from contextlib import closing
from pathlib import Path

import pytest

from server.store import schema
from server.store.backends import PostgresBackend, SqliteBackend
from server.store.schema import BASELINE, MIGRATIONS, SCHEMA_VERSION, Migration
from server.store.sqlite import Store
from tests.test_storage import SCHEMA_1

PROJECT = "c" * 32


def _columns(location: Path | str) -> dict[str, list[tuple[str, bool]]]:
    """Each table's columns (name, nullable) in order, the migration bookkeeping aside."""
    tables: dict[str, list[tuple[str, bool]]] = {}
    if isinstance(location, str):
        import psycopg

        with psycopg.connect(location) as raw:
            rows = raw.execute(
                "SELECT table_name, column_name, is_nullable FROM information_schema.columns "
                "WHERE table_schema = 'public' AND table_name NOT LIKE 'procrastinate%' "
                "AND table_name <> 'stationfit_migrations' "
                "ORDER BY table_name, ordinal_position"
            ).fetchall()
        for table, column, nullable in rows:
            tables.setdefault(table, []).append((column, nullable == "YES"))
        return tables
    with closing(sqlite3.connect(location)) as raw:
        names = [
            r[0]
            for r in raw.execute(
                "SELECT name FROM sqlite_master WHERE type = 'table' "
                "AND name NOT LIKE 'sqlite_%' ORDER BY name"
            )
        ]
        for table in names:
            tables[table] = [
                (r[1], not r[3] and not r[5]) for r in raw.execute(f"PRAGMA table_info({table})")
            ]
    return tables


def _version(location: Path | str) -> int:
    if isinstance(location, str):
        import psycopg

        with psycopg.connect(location) as raw:
            return raw.execute("SELECT MAX(version) FROM stationfit_migrations").fetchone()[0]
    with closing(sqlite3.connect(location)) as raw:
        return raw.execute("PRAGMA user_version").fetchone()[0]


def _build_at(location: Path | str, version: int) -> None:
    """A database at ``version``, made the way that version made it, with one project and
    one finished run."""
    backend = PostgresBackend(location) if isinstance(location, str) else SqliteBackend(location)
    with backend.write() as db:
        if isinstance(location, str):
            schema.upgrade_postgresql(db, "test", "2026-01-01T00:00:00+00:00", target=version)
        else:
            schema.upgrade_sqlite(db, "test", target=version)
        db.execute(
            "INSERT INTO projects (id, name, filename, created, fieldbook, sha256, form_token) "
            "VALUES (?, 'Old weir', 'weir.fieldbook', '2026-01-01T00:00:00+00:00', ?, 'h', ?)",
            (PROJECT, b"level A B 1.0\n", "t" * 32),
        )
        db.execute(
            "INSERT INTO runs (project_id, created, status, error, settings) VALUES "
            "(?, '2026-01-01T00:00:00+00:00', 'failed', '{\"kind\": \"other\", "
            '"message": "stopped"}\', \'{"edits": []}\')',
            (PROJECT,),
        )
    backend.close()


def test_an_empty_database_gets_the_whole_schema_at_the_newest_version(store_location):
    Store(store_location)
    assert _version(store_location) == SCHEMA_VERSION
    tables = _columns(store_location)
    assert {"projects", "runs", "pending_edits", "source_files", "run_progress"} <= set(tables)
    assert ("deleted", True) in tables["projects"] and ("settings", False) in tables["runs"]


def test_the_previous_schema_is_upgraded_keeping_its_projects_and_runs(
    store_location, tmp_path: Path, request: pytest.FixtureRequest
):
    previous = MIGRATIONS[-1].version - 1
    if isinstance(store_location, Path):
        store_location.parent.mkdir(parents=True)
    _build_at(store_location, previous)
    assert _version(store_location) == previous
    store = Store(store_location)
    assert store.upgraded_from == previous and _version(store_location) == SCHEMA_VERSION
    project = store.get_project(PROJECT)
    assert project is not None and project.fieldbook == b"level A B 1.0\n"
    (run,) = store.runs(PROJECT)
    assert (run.number, run.status, run.error["message"]) == (1, "failed", "stopped")
    assert store.start_run(PROJECT, {"edits": []}) > run.id  # writable after the upgrade
    # the upgraded database has exactly the tables and columns of a new one
    if isinstance(store_location, str):
        server = request.getfixturevalue("postgresql_server")
        fresh_url = server.create_database()
        try:
            Store(fresh_url).close()
            assert _columns(store_location) == _columns(fresh_url)
        finally:
            server.drop_database(fresh_url)
    else:
        fresh = tmp_path / "fresh" / "stationfit.sqlite3"
        Store(fresh)
        assert _columns(store_location) == _columns(fresh)


def test_a_schema_1_sqlite_folder_gets_the_same_tables_and_columns_as_a_new_one(tmp_path):
    old, new = tmp_path / "old.sqlite3", tmp_path / "new.sqlite3"
    with closing(sqlite3.connect(old)) as raw:
        raw.executescript(SCHEMA_1)
    assert Store(old).upgraded_from == 1
    Store(new)
    assert _columns(old) == _columns(new)
    assert _version(old) == _version(new) == SCHEMA_VERSION


def test_a_failing_migration_changes_nothing(store_location, monkeypatch):
    if isinstance(store_location, Path):
        store_location.parent.mkdir(parents=True)
    _build_at(store_location, SCHEMA_VERSION)
    broken = Migration(
        SCHEMA_VERSION + 1,
        "a step that fails half-way",
        sqlite=("CREATE TABLE half_done (x INTEGER)", "SELECT no_such_function()"),
        postgresql=("CREATE TABLE half_done (x INTEGER)", "SELECT no_such_function()"),
    )
    monkeypatch.setattr(schema, "MIGRATIONS", (*MIGRATIONS, broken))
    monkeypatch.setattr(schema, "SCHEMA_VERSION", SCHEMA_VERSION + 1)
    with pytest.raises(Exception, match=r"no_such_function|no such function"):
        Store(store_location)
    monkeypatch.undo()
    assert _version(store_location) == SCHEMA_VERSION
    assert "half_done" not in _columns(store_location)
    assert [r.status for r in Store(store_location).runs(PROJECT)] == ["failed"]


@pytest.mark.postgresql
def test_a_service_and_workers_opening_a_new_database_at_once_create_it_once(postgresql_url):
    errors: list[BaseException] = []
    start = threading.Barrier(6)

    def open_store() -> None:
        try:
            start.wait()
            Store(postgresql_url).close()
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=open_store) for _ in range(6)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(60)
    assert errors == []
    import psycopg

    with psycopg.connect(postgresql_url) as raw:
        versions = [r[0] for r in raw.execute("SELECT version FROM stationfit_migrations")]
    assert sorted(versions) == [BASELINE, *(m.version for m in MIGRATIONS)]
