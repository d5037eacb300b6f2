"""The project store: field books kept byte for byte, runs kept with their results or errors.

Every test runs on both back ends (``store_location`` in conftest.py: a SQLite file and a
PostgreSQL database), except those about SQLite's own file (WAL mode, data folders
written by earlier versions)."""

from __future__ import annotations

import hashlib
import sqlite3
import threading
from contextlib import closing
from pathlib import Path

import pytest

from server.errors import FieldbookError, NetworkError
from server.pipeline import adjust_fieldbook
from server.store.backends import integrity_errors
from server.store.sqlite import SCHEMA_VERSION, Store, is_valid_id

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"


def _query(db: Path | str, sql: str) -> tuple | None:
    """Run one statement on a separate raw connection, closed afterwards."""
    if isinstance(db, str):
        import psycopg

        with psycopg.connect(db, autocommit=True) as raw:
            cursor = raw.execute(sql)
            return cursor.fetchone() if cursor.description else None
    with closing(sqlite3.connect(db)) as raw:
        row = raw.execute(sql).fetchone()
        raw.commit()
        return row


@pytest.fixture
def db(store_location: Path | str) -> Path | str:
    """The store's location, on each back end in turn."""
    return store_location


@pytest.fixture
def sqlite_db(tmp_path: Path) -> Path:
    return tmp_path / "data" / "stationfit.sqlite3"


@pytest.fixture(scope="module")
def blunder_bytes() -> bytes:
    return (DEMOS / "leveling_blunder.fieldbook").read_bytes()


def test_project_and_result_survive_reopening_the_store(db, blunder_bytes):
    result = adjust_fieldbook(blunder_bytes, source="leveling_blunder.fieldbook")
    store = Store(db)
    project_id = store.create_project("Kestrel Ridge", "leveling_blunder.fieldbook", blunder_bytes)
    store.add_run(project_id, result=result)
    del store

    reopened = Store(db)
    project = reopened.get_project(project_id)
    assert project is not None
    assert project.fieldbook == blunder_bytes
    assert project.sha256 == hashlib.sha256(blunder_bytes).hexdigest() == result.text_sha256
    assert (project.name, project.filename) == ("Kestrel Ridge", "leveling_blunder.fieldbook")
    run = reopened.latest_run(project_id)
    assert run is not None and run.finished
    # the API serves the contract JSON unchanged; the pages rebuild the very same result object
    assert run.result_json == result.to_json_dict()
    assert run.result() == result


def test_failed_run_keeps_line_numbers_and_the_upload(db):
    text = b"defaults level=1mm\nlevel A B\nlevle A B 1.0\n"
    with pytest.raises(FieldbookError) as caught:
        adjust_fieldbook(text)
    store = Store(db)
    project_id = store.create_project("", "bad.fieldbook", text)
    store.add_run(project_id, error=caught.value)
    run = Store(db).latest_run(project_id)
    assert run is not None and run.status == "failed" and run.result_json is None
    assert run.error["kind"] == "fieldbook"
    assert [issue["line"] for issue in run.error["issues"]] == [2, 3]
    assert run.result() is None
    assert Store(db).get_project(project_id).fieldbook == text


def test_network_error_keeps_the_point_names(db):
    store = Store(db)
    project_id = store.create_project("", "", "defaults level=1mm\nlevel A B 1.0\n")
    store.add_run(project_id, error=NetworkError("no height datum", ["A", "B"]))
    error = store.latest_run(project_id).error
    assert error == {"kind": "network", "message": "no height datum", "points": ["A", "B"]}


def test_bytes_that_are_not_utf8_are_stored_unchanged(db):
    raw = b'title "caf\xe9"\r\nlevel A B 1.0\r\n'
    store = Store(db)
    project = store.get_project(store.create_project("latin-1", "old.fieldbook", raw))
    assert project.fieldbook == raw
    assert "\ufffd" in project.text  # shown with a replacement character, stored exactly


def test_runs_are_kept_in_order_and_latest_is_newest(db, blunder_bytes):
    store = Store(db)
    project_id = store.create_project("p", "f.fieldbook", blunder_bytes)
    first = store.add_run(project_id, error="stopped")
    second = store.add_run(project_id, result=adjust_fieldbook(blunder_bytes))
    assert [r.id for r in store.runs(project_id)] == [first, second]
    assert store.latest_run(project_id).id == second
    (listing,) = store.list_projects()
    assert listing.latest is not None and listing.latest.id == second
    assert listing.latest.summary["global_test"]["passed"] is False
    assert listing.latest.summary["flagged"] == 1  # line 38 of the blunder demo


def test_list_is_newest_first(db):
    store = Store(db)
    ids = [store.create_project(f"p{i}", "", "x") for i in range(3)]
    assert [p.id for p in store.list_projects()] == ids[::-1]
    assert all(p.latest is None for p in store.list_projects())


def test_delete_hides_the_project_and_a_purge_removes_it_and_its_runs(db):
    store = Store(db)
    project_id = store.create_project("p", "", "x")
    store.add_run(project_id, error="stopped")
    assert store.delete_project(project_id) is True
    assert store.get_project(project_id) is None
    assert store.list_projects() == []
    assert store.delete_project(project_id) is False  # already deleted
    assert [p.id for p in store.purge_deleted(0)] == [project_id]
    assert store.latest_run(project_id) is None
    assert _query(db, "SELECT COUNT(*) FROM runs") == (0,)
    assert _query(db, "SELECT COUNT(*) FROM projects") == (0,)


def test_a_deleted_project_is_listed_and_restored_with_its_runs(db):
    store = Store(db)
    project_id = store.create_project("Quarry pillars", "quarry.fieldbook", "x")
    store.add_run(project_id, error="stopped")
    store.add_run(project_id, error="stopped again")
    store.delete_project(project_id)
    [deleted] = store.deleted_projects()
    assert (deleted.id, deleted.name, deleted.runs) == (project_id, "Quarry pillars", 2)
    assert store.restore_project(project_id) is True
    assert store.restore_project(project_id) is False  # not deleted any more
    assert store.deleted_projects() == []
    assert [p.id for p in store.list_projects()] == [project_id]
    assert [r.error["message"] for r in store.runs(project_id)] == ["stopped", "stopped again"]


def test_a_purge_keeps_projects_deleted_less_than_the_retention_ago(db):
    store = Store(db)
    old, recent = store.create_project("old", "", "x"), store.create_project("new", "", "x")
    store.delete_project(old)
    store.delete_project(recent)
    _query(db, f"UPDATE projects SET deleted = '2026-01-01T00:00:00+00:00' WHERE id = '{old}'")
    assert [p.id for p in store.purge_deleted(30)] == [old]
    assert [p.id for p in store.deleted_projects()] == [recent]
    assert store.restore_project(old) is False


def test_a_run_needs_an_existing_project_and_leaves_nothing_behind_on_failure(db):
    store = Store(db)
    with pytest.raises(integrity_errors()):
        store.add_run("0" * 32, error="orphan")
    assert _query(db, "SELECT COUNT(*) FROM runs") == (0,)


def test_a_run_is_either_a_result_or_an_error(db):
    store = Store(db)
    project_id = store.create_project("p", "", "x")
    with pytest.raises(ValueError):
        store.add_run(project_id)


@pytest.mark.parametrize(
    "bad", ["", "../../etc/passwd", "1 OR 1=1", "ABCDEF" * 6, "g" * 32, "0" * 31, "0" * 33]
)
def test_malformed_ids_are_refused_without_touching_the_database(db, bad):
    store = Store(db)
    assert not is_valid_id(bad)
    assert store.get_project(bad) is None
    assert store.latest_run(bad) is None
    assert store.delete_project(bad) is False


def test_ids_are_unguessable_hex(db):
    store = Store(db)
    ids = {store.create_project("p", "", "x") for _ in range(20)}
    assert len(ids) == 20 and all(is_valid_id(i) for i in ids)


def test_database_is_in_wal_mode(sqlite_db):
    Store(sqlite_db)
    assert _query(sqlite_db, "PRAGMA journal_mode") == ("wal",)


def test_concurrent_writers_from_threads_lose_nothing(db):
    store = Store(db)
    errors: list[BaseException] = []

    def work(n: int) -> None:
        try:
            for i in range(10):
                project_id = store.create_project(f"t{n}-{i}", "", f"level A B {i}")
                store.add_run(project_id, error=f"run {n}-{i}")
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(n,)) for n in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    listings = store.list_projects()
    assert len(listings) == 80
    assert all(p.latest is not None and p.latest.status == "failed" for p in listings)


def test_newer_schema_is_refused(db):
    Store(db)
    if isinstance(db, str):
        _query(db, "INSERT INTO stationfit_migrations VALUES (99, 'future', '2030-01-01')")
        before = _query(db, "SELECT COUNT(*) FROM stationfit_migrations")
    else:
        _query(db, "PRAGMA user_version = 99")
    with pytest.raises(RuntimeError, match="newer"):
        Store(db)
    if isinstance(db, str):  # refused before anything was written
        assert _query(db, "SELECT COUNT(*) FROM stationfit_migrations") == before


# -- runs with settings, running runs, queued decisions, schema upgrade ---------------------

EXCLUDE_38 = {"line": 38, "action": "exclude", "reason": "rod misread", "date": "2026-12-02"}


def test_a_run_keeps_its_settings(db, blunder_bytes):
    store = Store(db)
    project_id = store.create_project("p", "f.fieldbook", blunder_bytes)
    upload = store.add_run(project_id, result=adjust_fieldbook(blunder_bytes))
    rerun = store.add_run(project_id, error="stopped", settings={"edits": [EXCLUDE_38]})
    reopened = Store(db)
    assert reopened.run(project_id, upload).edits == []  # an upload runs the book as it is
    assert reopened.run(project_id, rerun).edits == [EXCLUDE_38]
    assert [r.edits for r in reopened.runs(project_id)] == [[], [EXCLUDE_38]]
    assert reopened.run("0" * 32, rerun) is None  # a run is found only under its own project


def test_a_run_is_stored_running_then_finished_with_its_queued_decisions_in_one_go(
    db, blunder_bytes
):
    store = Store(db)
    project_id = store.create_project("p", "f.fieldbook", blunder_bytes)
    first = store.add_run(project_id, result=adjust_fieldbook(blunder_bytes))
    queued = store.add_pending_edit(project_id, EXCLUDE_38)
    run_id = store.start_run(project_id, {"edits": [EXCLUDE_38]})
    assert store.run(project_id, run_id).status == "running"
    assert store.latest_run(project_id).id == first  # a running run is never "the latest"
    assert store.list_projects()[0].latest.id == first
    store.finish_run(run_id, error=NetworkError("no height datum", ["KR-107"]), consumed=())
    assert [p.id for p in store.pending_edits(project_id)] == [queued]  # kept after a failure
    assert store.latest_run(project_id).id == run_id
    assert store.latest_run(project_id, finished=True).id == first
    with pytest.raises(ValueError, match="not running"):
        store.finish_run(run_id, error="again")

    second = store.start_run(project_id, {"edits": [EXCLUDE_38]})
    store.finish_run(second, result=adjust_fieldbook(blunder_bytes), consumed=(queued,))
    assert store.pending_edits(project_id) == []
    assert store.latest_run(project_id, finished=True).id == second


def test_an_interrupted_run_stays_running_and_the_earlier_runs_are_intact(db, blunder_bytes):
    result = adjust_fieldbook(blunder_bytes)
    store = Store(db)
    project_id = store.create_project("p", "f.fieldbook", blunder_bytes)
    first = store.add_run(project_id, result=result)
    store.add_pending_edit(project_id, EXCLUDE_38)
    interrupted = store.start_run(project_id, {"edits": [EXCLUDE_38]})
    del store  # the service stops before finishing

    reopened = Store(db)
    assert [(r.id, r.status) for r in reopened.runs(project_id)] == [
        (first, "finished"),
        (interrupted, "running"),
    ]
    assert reopened.latest_run(project_id).result() == result
    assert len(reopened.pending_edits(project_id)) == 1  # the decision is not lost either


def test_a_failed_finish_changes_nothing(db, blunder_bytes):
    store = Store(db)
    project_id = store.create_project("p", "f.fieldbook", blunder_bytes)
    queued = store.add_pending_edit(project_id, EXCLUDE_38)
    run_id = store.start_run(project_id, {"edits": [EXCLUDE_38]})
    with pytest.raises(ValueError):
        store.finish_run(run_id, result=None, error=None, consumed=(queued,))
    assert store.run(project_id, run_id).status == "running"
    assert [p.id for p in store.pending_edits(project_id)] == [queued]


def test_queued_decisions_are_listed_withdrawn_and_deleted_with_the_project(db):
    store = Store(db)
    project_id = store.create_project("p", "", "x")
    other = store.create_project("q", "", "x")
    first = store.add_pending_edit(project_id, EXCLUDE_38)
    second = store.add_pending_edit(project_id, {**EXCLUDE_38, "line": 12})
    assert [(p.id, p.edit["line"]) for p in store.pending_edits(project_id)] == [
        (first, 38),
        (second, 12),
    ]
    assert store.remove_pending_edit(other, first) is False  # not another project's decision
    assert store.remove_pending_edit(project_id, first) is True
    assert [p.id for p in store.pending_edits(project_id)] == [second]
    store.delete_project(project_id)
    store.purge_deleted(0)
    assert _query(db, "SELECT COUNT(*) FROM pending_edits") == (0,)


def test_every_project_gets_its_own_form_token(db):
    store = Store(db)
    tokens = {store.get_project(store.create_project("p", "", "x")).form_token for _ in range(5)}
    assert len(tokens) == 5 and all(len(t) == 32 for t in tokens)


SCHEMA_1 = """
CREATE TABLE projects (id TEXT PRIMARY KEY, name TEXT NOT NULL, filename TEXT NOT NULL,
    created TEXT NOT NULL, fieldbook BLOB NOT NULL, sha256 TEXT NOT NULL);
CREATE TABLE runs (id INTEGER PRIMARY KEY AUTOINCREMENT,
    project_id TEXT NOT NULL REFERENCES projects(id) ON DELETE CASCADE,
    created TEXT NOT NULL, status TEXT NOT NULL CHECK (status IN ('finished', 'failed')),
    result TEXT, detail TEXT, summary TEXT, error TEXT,
    CHECK ((status = 'finished') = (result IS NOT NULL)));
CREATE INDEX runs_by_project ON runs(project_id, id);
PRAGMA user_version = 1;
"""


def test_a_database_of_schema_1_is_upgraded_keeping_projects_and_runs(sqlite_db):
    db = sqlite_db
    db.parent.mkdir(parents=True)
    with closing(sqlite3.connect(db)) as raw:
        raw.executescript(SCHEMA_1)
        raw.execute(
            "INSERT INTO projects VALUES ('" + "a" * 32 + "', 'old', 'old.fieldbook', "
            "'2026-01-01T00:00:00+00:00', x'6c6576656c', 'h')"
        )
        raw.execute(
            "INSERT INTO runs (project_id, created, status, error) VALUES "
            "('" + "a" * 32 + "', '2026-01-01T00:00:00+00:00', 'failed', "
            '\'{"kind": "other", "message": "stopped"}\')'
        )
        raw.commit()
    store = Store(db)
    assert _query(db, "PRAGMA user_version") == (SCHEMA_VERSION,)
    project = store.get_project("a" * 32)
    assert project.fieldbook == b"level" and len(project.form_token) == 32
    (run,) = store.runs("a" * 32)
    assert run.status == "failed" and run.error["message"] == "stopped" and run.edits == []
    new = store.start_run("a" * 32, {"edits": []})  # the new status is allowed after the upgrade
    assert new > run.id
    Store(db)  # opening again leaves it as it is
    assert [r.id for r in Store(db).runs("a" * 32)] == [run.id, new]


def test_a_database_of_schema_3_is_upgraded_and_its_projects_stay_live(sqlite_db):
    """Schema 3 had no deletion time: every project it holds is live after the upgrade."""
    db = sqlite_db
    db.parent.mkdir(parents=True)
    with closing(sqlite3.connect(db)) as raw:
        raw.executescript(SCHEMA_3)
        raw.execute(
            "INSERT INTO projects (id, name, filename, created, fieldbook, sha256) "
            "VALUES (?, 'old', 'old.fieldbook', '2026-01-01T00:00:00+00:00', x'78', 'h')",
            ("b" * 32,),
        )
        raw.execute(
            "INSERT INTO runs (project_id, created, status, error) VALUES "
            "(?, '2026-01-01T00:00:00+00:00', 'failed', '{\"kind\": \"other\", "
            '"message": "stopped"}\')',
            ("b" * 32,),
        )
        raw.commit()
    store = Store(db)
    assert _query(db, "PRAGMA user_version") == (SCHEMA_VERSION,)
    assert [p.id for p in store.list_projects()] == ["b" * 32]
    assert store.deleted_projects() == []
    assert store.delete_project("b" * 32) is True
    assert store.restore_project("b" * 32) is True
    assert [r.error["message"] for r in store.runs("b" * 32)] == ["stopped"]


SCHEMA_3 = """
CREATE TABLE projects (id TEXT PRIMARY KEY, name TEXT NOT NULL, filename TEXT NOT NULL,
    created TEXT NOT NULL, fieldbook BLOB NOT NULL, sha256 TEXT NOT NULL,
    form_token TEXT NOT NULL DEFAULT '');
CREATE TABLE runs (id INTEGER PRIMARY KEY AUTOINCREMENT,
    project_id TEXT NOT NULL REFERENCES projects(id) ON DELETE CASCADE,
    created TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ('running', 'finished', 'failed', 'interrupted')),
    result TEXT, detail TEXT, summary TEXT, error TEXT,
    settings TEXT NOT NULL DEFAULT '{"edits": []}',
    CHECK ((status = 'finished') = (result IS NOT NULL)));
CREATE INDEX runs_by_project ON runs(project_id, id);
CREATE TABLE pending_edits (id INTEGER PRIMARY KEY AUTOINCREMENT,
    project_id TEXT NOT NULL REFERENCES projects(id) ON DELETE CASCADE,
    created TEXT NOT NULL, edit TEXT NOT NULL);
CREATE INDEX pending_by_project ON pending_edits(project_id, id);
PRAGMA user_version = 3;
"""


def test_runs_started_at_once_on_one_project_are_numbered_one_to_n_in_order(db):
    """Eight clients start runs on one project at the same moment: every run gets its own
    number, 1 to 40, in the order of its id, the same in the list and run by run."""
    store = Store(db)
    project_id = store.create_project("busy", "b.fieldbook", "x")
    start = threading.Barrier(8)
    errors: list[BaseException] = []

    def work() -> None:
        try:
            start.wait()
            for _ in range(5):
                run_id = store.start_run(project_id, {"edits": []})
                store.finish_run(run_id, error="stopped")
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=work) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    runs = store.runs(project_id)
    assert [r.number for r in runs] == list(range(1, 41))
    assert [r.id for r in runs] == sorted(r.id for r in runs)
    assert all(store.run(project_id, r.id).number == r.number for r in runs)
