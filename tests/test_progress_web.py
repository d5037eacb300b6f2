"""Long adjustments in the browser: progress while running, interrupted runs said plainly."""

from __future__ import annotations

import re
import threading
import warnings
from pathlib import Path

import pytest

from server.pipeline import adjust_parsed
from server.storage import NO_EDITS
from server.web import create_app, routes

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2
    from fastapi.testclient import TestClient

BLUNDER = Path(__file__).resolve().parents[1] / "demo_projects" / "leveling_blunder.fieldbook"


@pytest.fixture
def app(tmp_path: Path):
    return create_app(tmp_path / "data")


def test_a_long_adjustment_shows_its_stage_then_its_results(app, monkeypatch):
    release = threading.Event()

    def slow(book, *, progress=None):
        progress("iteration", 3)
        assert release.wait(20), "the test never released the adjustment"
        return adjust_parsed(book, progress=progress)

    monkeypatch.setattr(routes, "adjust_parsed", slow)
    monkeypatch.setattr(routes, "_WAIT_FOR_SMALL_JOBS", 0.05)
    with TestClient(app) as client:
        posted = client.post("/projects", files={"fieldbook": ("b.fieldbook", BLUNDER.read_bytes())},
                             follow_redirects=False)
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
