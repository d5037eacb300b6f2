"""The JSON of a result is written on a worker thread, never on the event loop.

Proved by ordering, not by timing: the encoding of the upload's answer waits
until the home page has been served.  On the event loop that wait would hold
the loop, the home page could not be served, and the wait would give up.
"""

from __future__ import annotations

import asyncio
import threading
from pathlib import Path

import httpx
import pytest

from server.web import create_app
from server.web.api import ResultJSONResponse

DEMO = Path(__file__).resolve().parents[1] / "demo_projects" / "leveling_clean.fieldbook"
#: Generous: only reached when the loop is blocked (the bug), never on a working service.
GIVE_UP_AFTER = 20.0


def _encoding_waits_for_the_home_page(
    monkeypatch,
) -> tuple[threading.Event, threading.Event, list[bool]]:
    """Make the first large JSON encoding wait until the test says the home page answered."""
    started, home_served, outcome = threading.Event(), threading.Event(), []
    render = ResultJSONResponse.render  # the result JSON's own encoding

    def waiting_render(self, content):
        if (
            not started.is_set()
            and isinstance(content, dict)
            and ("observations" in content or "result" in content)
        ):
            started.set()
            outcome.append(home_served.wait(GIVE_UP_AFTER))
        return render(self, content)

    monkeypatch.setattr(ResultJSONResponse, "render", waiting_render)
    return started, home_served, outcome


async def _upload_and_load_home(app, path: str) -> tuple[int, int]:
    started, home_served, outcome = app.state.test_events
    transport = httpx.ASGITransport(app=app)
    async with httpx.AsyncClient(transport=transport, base_url="http://testserver") as client:
        files = {"fieldbook": (DEMO.name, DEMO.read_bytes(), "text/plain")}
        upload = asyncio.create_task(client.post(path, files=files))
        while not started.is_set():  # the answer's encoding has begun
            await asyncio.sleep(0.01)
        home = await client.get("/")
        home_served.set()
        answer = await upload
    assert outcome == [True], "the encoding ran on the event loop: the home page waited for it"
    return answer.status_code, home.status_code


@pytest.mark.parametrize("path,status", [("/api/adjust", 200), ("/api/projects", 201)])
def test_the_home_page_answers_while_a_result_is_encoded(tmp_path, monkeypatch, path, status):
    app = create_app(tmp_path)
    app.state.test_events = _encoding_waits_for_the_home_page(monkeypatch)
    answer, home = asyncio.run(_upload_and_load_home(app, path))
    assert (answer, home) == (status, 200)


async def _results_page_and_home(app, project_id: str, events) -> tuple[int, int]:
    started, home_served, outcome = events
    transport = httpx.ASGITransport(app=app)
    async with httpx.AsyncClient(transport=transport, base_url="http://testserver") as client:
        page = asyncio.create_task(client.get(f"/projects/{project_id}"))
        while not started.is_set():  # the results page is being built
            await asyncio.sleep(0.01)
        home = await client.get("/")
        home_served.set()
        answer = await page
    assert outcome == [True], "the results page was built on the event loop"
    return answer.status_code, home.status_code


def test_the_home_page_answers_while_a_results_page_is_built(tmp_path, monkeypatch):
    import jinja2

    app = create_app(tmp_path)
    from server.store.projects import Upload
    from server.store.projects import submit as _submit

    project_id, result, _ = _submit(app.state.store, Upload(DEMO.read_bytes(), DEMO.name, ""))
    assert result is not None
    started, home_served, outcome = threading.Event(), threading.Event(), []
    render = jinja2.Template.render

    def waiting_render(self, *args, **kwargs):
        if self.name == "results.html" and not started.is_set():
            started.set()
            outcome.append(home_served.wait(GIVE_UP_AFTER))
        return render(self, *args, **kwargs)

    monkeypatch.setattr(jinja2.Template, "render", waiting_render)
    events = (started, home_served, outcome)
    assert asyncio.run(_results_page_and_home(app, project_id, events)) == (200, 200)
