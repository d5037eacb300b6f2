"""Long adjustments in the browser: progress while running, interrupted runs said plainly."""

from __future__ import annotations

import logging
import re
import threading
import warnings
from pathlib import Path

import pytest

from server.pipeline import UNLIMITED, adjust_parsed
from server.store import projects as routes
from server.store.sqlite import NO_EDITS, RunGone
from server.web import create_app, dependencies

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2
    from fastapi.testclient import TestClient

BLUNDER = Path(__file__).resolve().parents[1] / "demo_projects" / "leveling_blunder.fieldbook"


@pytest.fixture
def app(tmp_path: Path):
    return create_app(tmp_path / "data")


def test_a_long_adjustment_shows_its_stage_then_its_results(app, monkeypatch):
    release = threading.Event()

    def slow(book, *, progress=None, limits=UNLIMITED):
        progress("iteration", 3)
        assert release.wait(20), "the test never released the adjustment"
        return adjust_parsed(book, progress=progress, limits=limits)

    monkeypatch.setattr(routes, "adjust_parsed", slow)
    monkeypatch.setattr(dependencies, "WAIT_FOR_SMALL_JOBS", 0.05)
    with TestClient(app) as client:
        posted = client.post(
            "/projects",
            files={"fieldbook": ("b.fieldbook", BLUNDER.read_bytes())},
            follow_redirects=False,
        )
        assert posted.status_code == 303
        url = posted.headers["location"]
        waiting = client.get(url)
        assert waiting.status_code == 200
        assert "Adjusting" in waiting.text and "Iterating (iteration 3)" in waiting.text
        assert re.search(r'<meta http-equiv="refresh" content="\d+">', waiting.text)
        # other pages answer while it runs
        assert client.get("/projects").status_code == 200
        release.set()
        job = app.state.jobs
        for _ in range(200):
            if not job._jobs:
                break
            threading.Event().wait(0.05)
        done = client.get(url)
        assert "Adjusting" not in done.text
        assert "Fails" in done.text  # the blunder demo's global test verdict


def test_a_run_the_service_did_not_finish_is_called_interrupted(app):
    store = app.state.store
    project = store.create_project("crashed", "b.fieldbook", BLUNDER.read_bytes())
    store.start_run(project, NO_EDITS)  # never finished: the process died
    with TestClient(app) as client:
        page = client.get(f"/projects/{project}")
    assert page.status_code == 200
    assert "was interrupted" in page.text
    assert "Adjusting" not in page.text


def test_an_interrupted_run_is_named_by_its_number_in_the_project(app):
    store = app.state.store
    earlier = store.create_project("earlier", "a.fieldbook", BLUNDER.read_bytes())
    for _ in range(3):
        store.add_run(earlier, error="the adjustment stopped unexpectedly")
    project = store.create_project("crashed", "b.fieldbook", BLUNDER.read_bytes())
    run_id = store.start_run(project, NO_EDITS)
    assert run_id == 4
    with TestClient(app) as client:
        page = client.get(f"/projects/{project}")
    assert "Run #1 was interrupted" in page.text
    assert "#4" not in page.text


def test_a_project_deleted_while_it_adjusts_leaves_no_traceback(app, monkeypatch, caplog):
    """The result of a deleted project is dropped with one line in the log, not a traceback."""
    started, release = threading.Event(), threading.Event()
    escaped: list[BaseException] = []

    def slow(book, *, progress=None, limits=UNLIMITED):
        started.set()
        assert release.wait(20), "the test never released the adjustment"
        return adjust_parsed(book, progress=progress, limits=limits)

    monkeypatch.setattr(routes, "adjust_parsed", slow)
    monkeypatch.setattr(dependencies, "WAIT_FOR_SMALL_JOBS", 0.05)
    monkeypatch.setattr(threading, "excepthook", lambda args: escaped.append(args.exc_value))
    caplog.set_level(logging.INFO, logger="stationfit.web")
    with TestClient(app) as client:
        posted = client.post(
            "/projects",
            follow_redirects=False,
            files={"fieldbook": ("b.fieldbook", BLUNDER.read_bytes())},
        )
        project = posted.headers["location"].rsplit("/", 1)[-1]
        assert started.wait(20)
        confirm = client.post(f"/projects/{project}/confirm-delete").text
        token = re.search(r'name="token" value="([0-9a-f]{32})"', confirm).group(1)
        deleted = client.post(
            f"/projects/{project}/delete", data={"token": token}, follow_redirects=False
        )
        assert deleted.status_code == 303
        (job,) = list(app.state.jobs._jobs.values())
        release.set()
        assert job.done.wait(20)
        assert client.get(f"/projects/{project}").status_code == 404
    assert escaped == []
    assert not [r for r in caplog.records if r.levelno >= logging.WARNING], caplog.text
    assert not [r for r in caplog.records if r.exc_info], caplog.text
    assert any("deleted during the adjustment" in r.getMessage() for r in caplog.records)


def test_a_run_of_a_deleted_project_cannot_be_finished_and_says_why(app):
    store = app.state.store
    project = store.create_project("gone", "b.fieldbook", BLUNDER.read_bytes())
    run = store.start_run(project, NO_EDITS)
    store.delete_project(project)
    with pytest.raises(RunGone, match="deleted"):
        store.finish_run(run, error="never mind")


def test_an_api_upload_deleted_while_it_adjusts_is_not_found_not_a_server_error(app, monkeypatch):
    store = app.state.store

    def deleted_meanwhile(book, *, progress=None, limits=UNLIMITED):
        for listing in store.list_projects():
            store.delete_project(listing.id)
        return adjust_parsed(book, progress=progress, limits=limits)

    monkeypatch.setattr(routes, "adjust_parsed", deleted_meanwhile)
    with TestClient(app, raise_server_exceptions=False) as client:
        answer = client.post(
            "/api/projects", files={"fieldbook": ("b.fieldbook", BLUNDER.read_bytes())}
        )
    assert answer.status_code == 404
    assert answer.json() == {"error": "This project was deleted while it was being adjusted."}
