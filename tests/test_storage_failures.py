"""A data folder the service cannot use (issue 12, item 5).

The administrator gets one line naming the folder and the system's reason (in the log
while serving, on stderr at start-up, never a traceback); the surveyor gets a page that
says the upload was not stored, not that "the field book was not changed".
Tests run as root, where a read-only folder still accepts writes, so the failures are
made the way the system reports them: SQLite refusing to write, or a file where the
folder should be.
"""

from __future__ import annotations

import logging
import sqlite3
import subprocess
import sys
import warnings
from pathlib import Path

import pytest

import server.store.backends as storage
from server.web import create_app

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2
    from fastapi.testclient import TestClient

REPO = Path(__file__).resolve().parents[1]
BLUNDER = (REPO / "demo_projects" / "leveling_blunder.fieldbook").read_bytes()


def _read_only(monkeypatch: pytest.MonkeyPatch) -> None:
    """Every later connection behaves like SQLite on a read-only data folder."""
    real = sqlite3.connect

    class ReadOnly(sqlite3.Connection):
        def execute(self, sql, *args):  # type: ignore[override]
            if not sql.lstrip().upper().startswith(("SELECT", "PRAGMA")):
                raise sqlite3.OperationalError("attempt to write a readonly database")
            return super().execute(sql, *args)

    monkeypatch.setattr(
        storage.sqlite3, "connect", lambda *a, **k: real(*a, **{**k, "factory": ReadOnly})
    )


@pytest.mark.parametrize("route", ["/projects", "/api/projects", "/demos/leveling_blunder"])
def test_an_upload_the_store_refuses_says_it_was_not_stored(tmp_path, monkeypatch, caplog, route):
    data = tmp_path / "data"
    with TestClient(create_app(data), raise_server_exceptions=False) as client:
        _read_only(monkeypatch)
        caplog.set_level(logging.ERROR, logger="stationfit.web")
        files = None if route.startswith("/demos/") else {"fieldbook": ("b.fieldbook", BLUNDER)}
        response = client.post(route, files=files, follow_redirects=False)
        assert response.status_code == 503
        text = response.json()["error"] if route.startswith("/api/") else response.text
        assert "could not be stored" in text and "Nothing was saved" in text
        assert "not changed" not in text and "Traceback" not in text
        assert str(data) not in text  # the folder is for the administrator, not the page
        monkeypatch.undo()
        assert client.get("/api/projects").json()["projects"] == []
    logged = [r.getMessage() for r in caplog.records]
    assert any(str(data) in m and "readonly database" in m for m in logged), logged


def test_reading_pages_with_an_unreadable_store_say_so(tmp_path, monkeypatch, caplog):
    data = tmp_path / "data"
    with TestClient(create_app(data), raise_server_exceptions=False) as client:

        def broken(*args, **kwargs):
            raise sqlite3.OperationalError("unable to open database file")

        monkeypatch.setattr(storage.sqlite3, "connect", broken)
        caplog.set_level(logging.ERROR, logger="stationfit.web")
        page = client.get("/projects")
        assert page.status_code == 503
        assert "cannot be read" in page.text and "administrator" in page.text
        assert client.get("/api/projects").status_code == 503
    assert any(str(data) in r.getMessage() for r in caplog.records)


def _serve(data: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "server", "serve", "--data", str(data), "--port", "1"],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=60,
    )


def test_serve_with_a_file_where_the_data_folder_should_be_says_so(tmp_path):
    data = tmp_path / "not-a-folder"
    data.write_text("a file, not a folder")
    done = _serve(data)
    assert done.returncode == 73
    assert "Traceback" not in done.stderr
    assert f"cannot use the data folder {data}" in done.stderr
    assert "File exists" in done.stderr or "Not a directory" in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1


def test_serve_with_an_unopenable_database_says_so(tmp_path):
    data = tmp_path / "data"
    (data / "stationfit.sqlite3").mkdir(parents=True)  # a folder where the database belongs
    done = _serve(data)
    assert done.returncode == 73
    assert "Traceback" not in done.stderr
    assert f"cannot use the data folder {data}" in done.stderr
    assert "unable to open database file" in done.stderr
