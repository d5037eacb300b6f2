"""Schema 5 (before accounts) upgraded to 6 on a copy of a data folder's database with
projects in it: every row of every schema-5 table is still there, unchanged, the copy
opens in the web service with accounts, and the projects from before accounts belong to
no one (shared with the whole office)."""

from __future__ import annotations

import hashlib
import shutil
import sqlite3
import warnings
from contextlib import closing
from pathlib import Path

from server.store import projects as service
from server.store.accounts import Accounts
from server.store.projects import Upload
from server.store.sqlite import SCHEMA_VERSION, Store
from server.web import create_app, imports
from server.web.app import DATABASE_NAME
from tests.schema5 import make_schema_5
from tests.test_review import TWO_BLUNDERS, leveling_with_blunders

with warnings.catch_warnings():  # starlette's notice about httpx, as tests/test_web.py
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

REPO = Path(__file__).resolve().parents[1]
#: The columns of each table at schema 5, in order.
SCHEMA_5_COLUMNS = {
    "projects": "id, name, filename, created, fieldbook, sha256, form_token, deleted",
    "runs": "id, project_id, created, status, result, detail, summary, error, settings",
    "pending_edits": "id, project_id, created, edit",
    "source_files": "project_id, filename, content, sha256",
}


def _rows(db: Path) -> dict[str, list[tuple]]:
    with closing(sqlite3.connect(db)) as raw:
        return {
            table: raw.execute(f"SELECT {columns} FROM {table} ORDER BY 1").fetchall()
            for table, columns in SCHEMA_5_COLUMNS.items()
        }


def _schema_5_folder(folder: Path) -> dict[str, str]:
    """A schema-5 database with real projects: adjusted, failed, re-run with a decision,
    a decision queued, imported from survey XML, and one deleted.  Made by today's store
    and written into schema-5 tables column by column."""
    work = Store(folder / "made-today.sqlite3")
    book = leveling_with_blunders(TWO_BLUNDERS)
    ids = {}
    ids["adjusted"], _, _ = service.submit(work, Upload(book.encode(), "net.fieldbook", "Net"))
    ids["failed"], _, _ = service.submit(work, Upload(b"level A\n", "bad.fieldbook", ""))
    ids["rerun"], _, _ = service.submit(work, Upload(book.encode(), "net.fieldbook", "Rerun"))
    project = work.get_project(ids["rerun"])
    line = next(k for k, text in enumerate(book.splitlines(), 1) if "M2 M4" in text)
    decision = {"line": line, "action": "exclude", "reason": "misread", "date": "2026-11-30"}
    work.add_pending_edit(ids["rerun"], decision)
    service.rerun(work, service.load_state(work, project))
    work.add_pending_edit(ids["rerun"], {**decision, "line": line + 1, "reason": "queued"})
    xml = (REPO / "demo_projects" / "xml_traverse_two_faces.xml").read_bytes()
    ids["imported"] = imports.store_import(work, Upload(xml, "traverse.xml", ""))
    ids["deleted"], _, _ = service.submit(work, Upload(book.encode(), "old.fieldbook", "Old"))
    work.delete_project(ids["deleted"])
    old = folder / DATABASE_NAME
    make_schema_5(old)
    with closing(sqlite3.connect(old)) as raw:
        raw.execute("ATTACH DATABASE ? AS today", (str(work.path),))
        for table, columns in SCHEMA_5_COLUMNS.items():
            raw.execute(f"INSERT INTO {table} ({columns}) SELECT {columns} FROM today.{table}")
        raw.commit()
        raw.execute("DETACH DATABASE today")
    return ids


def test_a_copy_of_a_schema_5_database_is_upgraded_with_nothing_lost(tmp_path):
    original = tmp_path / "office"
    ids = _schema_5_folder(original)
    before = _rows(original / DATABASE_NAME)
    assert len(before["projects"]) == 5 and len(before["runs"]) == 5
    assert len(before["pending_edits"]) == 1 and len(before["source_files"]) == 1
    digest = hashlib.sha256((original / DATABASE_NAME).read_bytes()).hexdigest()

    copy = tmp_path / "copy"
    copy.mkdir()
    shutil.copy(original / DATABASE_NAME, copy / DATABASE_NAME)
    store = Store(copy / DATABASE_NAME)

    with closing(sqlite3.connect(copy / DATABASE_NAME)) as raw:
        assert raw.execute("PRAGMA user_version").fetchone() == (SCHEMA_VERSION,)
        assert raw.execute("PRAGMA integrity_check").fetchone() == ("ok",)
        assert raw.execute("PRAGMA foreign_key_check").fetchall() == []
        owners = raw.execute("SELECT owner_id, shared_with_office FROM projects").fetchall()
    assert _rows(copy / DATABASE_NAME) == before  # every schema-5 row, byte for byte
    assert set(owners) == {(None, 0)}  # from before accounts: no owner, the whole office's
    assert hashlib.sha256((original / DATABASE_NAME).read_bytes()).hexdigest() == digest

    # the projects read as before, and an account of the office sees every one of them
    accounts = Accounts(store)
    sam = accounts.add("sam", "surveyor", "three words of moss")
    listed = {p.id for p in store.list_projects(sam.actor)}
    assert listed == {ids[k] for k in ("adjusted", "failed", "rerun", "imported")}
    assert [p.id for p in store.deleted_projects(sam.actor)] == [ids["deleted"]]
    rerun = store.runs(ids["rerun"])
    assert [r.status for r in rerun] == ["finished", "finished"]
    assert rerun[-1].edits[0]["reason"] == "misread" and rerun[0].started_by is None
    assert store.latest_run(ids["adjusted"]).result() is not None
    assert [p.edit["reason"] for p in store.pending_edits(ids["rerun"])] == ["queued"]
    assert store.get_project(ids["imported"]).source.filename == "traverse.xml"

    # the upgraded copy serves the office: sign in, open, approve the reviewed run
    app = create_app(copy)
    with TestClient(app, base_url="http://127.0.0.1:8000") as client:
        signed = client.post(
            "/sign-in",
            data={"name": "sam", "password": "three words of moss"},
            follow_redirects=False,
        )
        assert signed.status_code == 303
        assert client.get(f"/projects/{ids['adjusted']}").status_code == 200
        assert client.get(f"/projects/{ids['rerun']}/review").status_code == 200
        assert client.get(f"/projects/{ids['adjusted']}/report.pdf").status_code == 200
        token = store.get_project(ids["adjusted"]).form_token
        (run,) = store.runs(ids["adjusted"])
        approved = client.post(
            f"/projects/{ids['adjusted']}/runs/{run.id}/approve",
            data={"token": token},
            follow_redirects=False,
        )
        assert approved.status_code == 303
    assert store.approvals(ids["adjusted"])[run.id].approved_by == "sam"
