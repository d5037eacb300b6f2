"""In a real browser: the re-run button of an interrupted run, and a form another site posts.

Chromium's own headers are what the server checks (``Origin``, ``Sec-Fetch-Site``);
the test client can only imitate them, so both sides are driven here once for real.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from server.store.sqlite import NO_EDITS, Store
from server.web.app import DATABASE_NAME
from tests.browser_support import browser_problems, free_port

pytestmark = pytest.mark.browser

CLEAN = Path(__file__).resolve().parents[1] / "demo_projects" / "leveling_clean.fieldbook"


@pytest.fixture(scope="module")
def seeded(tmp_path_factory: pytest.TempPathFactory) -> dict[str, str]:
    """A data folder as a killed service leaves it: one project whose only run never finished."""
    data = tmp_path_factory.mktemp("interrupted-data")
    store = Store(data / DATABASE_NAME)
    project = store.create_project("Cut off", CLEAN.name, CLEAN.read_bytes())
    store.start_run(project, NO_EDITS)
    return {"data": str(data), "project": project}


@pytest.fixture(scope="module")
def base_url(seeded) -> Iterator[str]:
    """The service restarted on the seeded folder (this module's own server)."""
    import uvicorn

    from server.web import create_app

    port = free_port()
    app = create_app(Path(seeded["data"]))
    config = uvicorn.Config(
        app, host="127.0.0.1", port=port, log_level="warning", ws="none", lifespan="off"
    )
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started:
        if time.monotonic() > deadline or not thread.is_alive():
            pytest.fail("uvicorn did not start")
        time.sleep(0.05)
    yield f"http://127.0.0.1:{port}"
    server.should_exit = True
    thread.join(timeout=10)


def test_the_re_run_button_adjusts_an_interrupted_run(page, base_url, seeded):
    page.goto(f"{base_url}/projects/{seeded['project']}")
    assert "was interrupted" in page.locator("main").inner_text()
    page.get_by_role("button", name="Re-run #1 with the same decisions").click()
    page.wait_for_selector(".verdict")
    assert "Passes" in page.locator(".verdict").inner_text()
    assert "was interrupted" not in page.locator("main").inner_text()
    assert browser_problems(page) == []


def test_a_form_on_another_site_cannot_store_a_field_book(page, base_url):
    before = page.request.get(f"{base_url}/api/projects").json()["projects"]
    foreign = f"""<!doctype html><title>elsewhere</title>
<form id="f" method="post" action="{base_url}/projects" enctype="multipart/form-data">
<textarea name="text">{CLEAN.read_text()}</textarea><button>go</button></form>"""
    page.route(
        "http://elsewhere.example/**",
        lambda route: route.fulfill(body=foreign, content_type="text/html"),
    )
    page.goto("http://elsewhere.example/")
    with page.expect_navigation():
        page.get_by_role("button", name="go").click()
    assert "another site" in page.locator("main").inner_text()
    after = page.request.get(f"{base_url}/api/projects").json()["projects"]
    assert after == before
