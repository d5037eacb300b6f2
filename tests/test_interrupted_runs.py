"""A run cut off by a stopped service (issue 12, item 5).

The run is stored as ``interrupted`` when the service next starts (a state in the
database, not a page label), and the results and review pages offer a button that
adjusts the field book again with exactly the decisions the interrupted run had.
The kill itself is reproduced with a real process in ``tests/test_faults.py``; here
the store is left as a killed process leaves it: a run started and never finished.
"""

from __future__ import annotations

import re
import sqlite3
import warnings
from contextlib import closing
from pathlib import Path

import pytest

from server.store.sqlite import NO_EDITS, Store
from server.web.app import DATABASE_NAME
from tests.postgres import app_on
from tests.test_review import TWO_BLUNDERS, leveling_with_blunders

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2
    from fastapi.testclient import TestClient

TEXT = leveling_with_blunders(TWO_BLUNDERS)
#: The line of the +15 mm blunder on M2→M4 (tests/test_review.py).
FIRST = next(k for k, line in enumerate(TEXT.splitlines(), 1) if line.startswith("level M2 M4"))
EXCLUDE_FIRST = {
    "line": FIRST,
    "action": "exclude",
    "reason": "staff misread",
    "date": "2026-01-02",
}


def _statuses(database: Path | str) -> list[tuple[int, str]]:
    if isinstance(database, str):
        import psycopg

        with psycopg.connect(database) as db:
            return db.execute("SELECT id, status FROM runs ORDER BY id").fetchall()
    with closing(sqlite3.connect(database)) as db:
        return db.execute("SELECT id, status FROM runs ORDER BY id").fetchall()


def _retry_form(html: str) -> tuple[str, str]:
    """(action, token) of the page's re-run button for an interrupted run."""
    match = re.search(
        r'<form class="rerun" method="post" action="(/projects/[0-9a-f]{32}/runs/'
        r'\d+/retry)">\s*<input type="hidden" name="token" value="([0-9a-f]{32})">',
        html,
    )
    assert match, "no re-run button for the interrupted run"
    return match.group(1), match.group(2)


def test_a_restart_stores_the_cut_off_run_as_interrupted(store_location):
    store = Store(store_location)
    project = store.create_project("p", "p.fieldbook", TEXT)
    done = store.start_run(project, NO_EDITS)
    cut = store.start_run(project, {"edits": [EXCLUDE_FIRST]})
    store.finish_run(done, error="an earlier failure")
    assert store.mark_interrupted() == [cut]
    assert _statuses(store_location) == [(done, "failed"), (cut, "interrupted")]
    run = store.run(project, cut)
    assert run.error["kind"] == "interrupted" and run.result_json is None
    assert run.edits == [EXCLUDE_FIRST]  # the decisions it was given are kept
    assert store.latest_run(project).id == done  # an interrupted run is never "the latest"
    assert store.list_projects()[0].latest.id == done
    with pytest.raises(ValueError, match="not running"):
        store.finish_run(cut, error="too late")  # a finish after the restart cannot land
    assert store.mark_interrupted() == []


def test_an_interrupted_first_run_is_re_run_from_the_results_page(store_location):
    killed = Store(store_location)
    project = killed.create_project("Cut off", "cut.fieldbook", TEXT)
    cut = killed.start_run(project, NO_EDITS)  # the process dies here

    with TestClient(app_on(store_location, Path("/nonexistent"))) as client:
        assert _statuses(store_location) == [(cut, "interrupted")]
        page = client.get(f"/projects/{project}").text
        assert "was interrupted" in page
        action, token = _retry_form(page)
        assert action == f"/projects/{project}/runs/{cut}/retry"
        review = client.get(f"/projects/{project}/review").text
        assert "did not finish" in review and _retry_form(review)[0] == action

        assert client.post(action, data={}, follow_redirects=False).status_code == 403
        response = client.post(action, data={"token": token}, follow_redirects=False)
        assert response.status_code == 303
        assert response.headers["location"] == f"/projects/{project}"

        body = client.get(f"/api/projects/{project}").json()
        assert [r["status"] for r in body["runs"]] == ["interrupted", "finished"]
        assert body["result"]["summary"]["observations"] == TEXT.count("\nlevel ")
        page = client.get(f"/projects/{project}").text
        assert "was interrupted" not in page and "/retry" not in page
        # the button belongs to the interrupted run only: a second press is refused
        again = client.post(
            f"/projects/{project}/runs/{body['runs'][1]['id']}/retry", data={"token": token}
        )
        assert again.status_code == 404


def test_an_interrupted_re_run_is_repeated_with_the_same_decisions(store_location):
    with TestClient(app_on(store_location, Path("/nonexistent"))) as client:
        upload = client.post("/api/projects", files={"fieldbook": ("b.fieldbook", TEXT)})
        project = upload.json()["id"]
        before = client.get(f"/api/projects/{project}").json()
        first = before["runs"][0]["id"]
        store: Store = client.app.state.store
        flagged = [o["line"] for o in before["result"]["observations"] if o["flagged"]]
        assert FIRST in flagged  # the blunder the decision removes
        store.add_pending_edit(project, EXCLUDE_FIRST)
        cut = store.start_run(project, {"edits": [EXCLUDE_FIRST], "based_on": first})

    with TestClient(app_on(store_location, Path("/nonexistent"))) as client:  # the restart
        assert _statuses(store_location)[-1] == (cut, "interrupted")
        review = client.get(f"/projects/{project}/review").text
        action, token = _retry_form(review)
        assert client.post(action, data={"token": token}).status_code == 200
        body = client.get(f"/api/projects/{project}").json()
        assert [r["status"] for r in body["runs"]] == ["finished", "interrupted", "finished"]
        assert body["runs"][-1]["edits"] == [EXCLUDE_FIRST]
        left_out = next(o for o in body["result"]["observations"] if o["line"] == FIRST)
        assert left_out["ignored"] is True
        assert client.app.state.store.pending_edits(project) == []  # applied, so not queued


#: The tables as schema 2 wrote them (before ``interrupted`` existed).
SCHEMA_2 = """
CREATE TABLE projects (id TEXT PRIMARY KEY, name TEXT NOT NULL, filename TEXT NOT NULL,
    created TEXT NOT NULL, fieldbook BLOB NOT NULL, sha256 TEXT NOT NULL,
    form_token TEXT NOT NULL DEFAULT '');
CREATE TABLE runs (id INTEGER PRIMARY KEY AUTOINCREMENT,
    project_id TEXT NOT NULL REFERENCES projects(id) ON DELETE CASCADE,
    created TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ('running', 'finished', 'failed')),
    result TEXT, detail TEXT, summary TEXT, error TEXT,
    settings TEXT NOT NULL DEFAULT '{"edits": []}',
    CHECK ((status = 'finished') = (result IS NOT NULL)));
CREATE INDEX runs_by_project ON runs(project_id, id);
CREATE TABLE pending_edits (id INTEGER PRIMARY KEY AUTOINCREMENT,
    project_id TEXT NOT NULL REFERENCES projects(id) ON DELETE CASCADE,
    created TEXT NOT NULL, edit TEXT NOT NULL);
CREATE INDEX pending_by_project ON pending_edits(project_id, id);
PRAGMA user_version = 2;
"""


def test_a_schema_2_database_is_upgraded_and_its_cut_off_run_kept(tmp_path):
    """Schema 2 did not allow the ``interrupted`` state; the upgrade keeps every run."""
    from server.store.sqlite import SCHEMA_VERSION

    database = tmp_path / DATABASE_NAME
    with closing(sqlite3.connect(database)) as raw:
        raw.executescript(SCHEMA_2)
        raw.execute(
            "INSERT INTO projects (id, name, filename, created, fieldbook, sha256) "
            "VALUES (?, 'old', 'old.fieldbook', '2026-01-01T00:00:00+00:00', ?, 'h')",
            ("a" * 32, TEXT.encode()),
        )
        raw.execute(
            "INSERT INTO runs (project_id, created, status, settings) VALUES "
            "(?, '2026-01-01T00:00:00+00:00', 'running', ?)",
            ("a" * 32, '{"edits": []}'),
        )
        raw.commit()
        with pytest.raises(sqlite3.IntegrityError):  # the old table refuses the new state
            raw.execute("UPDATE runs SET status = 'interrupted'")
    store = Store(database)
    with closing(sqlite3.connect(database)) as raw:
        assert raw.execute("PRAGMA user_version").fetchone() == (SCHEMA_VERSION,)
    (run,) = store.runs("a" * 32)
    assert run.status == "running"  # opening the store alone decides nothing
    assert store.mark_interrupted() == [run.id]
    assert _statuses(database) == [(run.id, "interrupted")]
    assert store.get_project("a" * 32).fieldbook == TEXT.encode()
