"""The office service in a real browser: a technician signs in, uploads, shares the project
with the surveyor, proposes a decision and re-runs; the surveyor in responsible charge signs
in and approves the run, and its report says so.

Drives the system chromium through Playwright against uvicorn serving a data folder with
accounts, clicking through the real pages only (no script runs on them but the service's
own, under its content security policy).  Skipped only when chromium is not installed.
"""

from __future__ import annotations

import re
import threading
import time

import pytest

from tests.browser_support import browser_problems, free_port
from tests.test_review import TWO_BLUNDERS, leveling_with_blunders

pytestmark = pytest.mark.browser

PASSWORD = "benchmarks stay put"
TEXT = leveling_with_blunders(TWO_BLUNDERS)
FIRST = next(k for k, line in enumerate(TEXT.splitlines(), 1) if line.startswith("level M2 M4"))


@pytest.fixture(scope="module")
def base_url(tmp_path_factory):
    """uvicorn on 127.0.0.1 over a data folder with a technician and a surveyor."""
    import uvicorn

    from server.web import create_app

    app = create_app(tmp_path_factory.mktemp("office-browser"))
    app.state.accounts.add("tom", "technician", PASSWORD)
    app.state.accounts.add("sam", "surveyor", PASSWORD)
    port = free_port()
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


def _click_and_wait(page, locator) -> None:
    with page.expect_navigation():
        locator.click()


def _sign_in(page, base_url: str, name: str, where: str = "/projects") -> None:
    page.goto(base_url + where)
    assert "/sign-in?next=" in page.url  # every page asks who you are first
    page.get_by_label("Account name").fill(name)
    page.get_by_label("Password").fill(PASSWORD)
    _click_and_wait(page, page.get_by_role("button", name="Sign in"))
    assert page.url == base_url + where
    assert name in page.locator(".user-menu").inner_text()


def test_technician_uploads_and_proposes_then_the_surveyor_approves(browser, base_url, tmp_path):
    tom = browser.new_context(accept_downloads=True, viewport={"width": 1366, "height": 900})
    page = tom.new_page()
    page.console_messages = []  # type: ignore[attr-defined]
    page.on("console", lambda m: page.console_messages.append(f"{m.type}: {m.text}"))

    # the technician signs in, uploads, and shares the project with the surveyor
    _sign_in(page, base_url, "tom", "/")
    book = tmp_path / "two-blunders.fieldbook"
    book.write_text(TEXT)
    page.set_input_files("input#fieldbook", str(book))
    _click_and_wait(page, page.get_by_role("button", name="Adjust"))
    project_url = page.url
    assert "Fails" in page.locator(".verdict").inner_text()
    assert "Owned by tom" in page.locator("#sharing").inner_text()
    page.get_by_label(re.compile("^Shared with these accounts")).fill("sam")
    _click_and_wait(page, page.get_by_role("button", name="Save sharing"))
    assert "Shared with sam" in page.locator("#sharing").inner_text()

    # proposes leaving out the worst observation, and re-runs
    _click_and_wait(page, page.get_by_role("link", name=re.compile(r"^Review observations")))
    assert (
        "The surveyor in responsible charge approves runs" in page.locator("#approval").inner_text()
    )
    worst = page.locator(f"#line-{FIRST}")
    worst.locator("summary").click()
    worst.get_by_label(re.compile(r"^Reason")).fill("staff misread at M4")
    _click_and_wait(page, worst.get_by_role("button", name="Queue decision"))
    _click_and_wait(page, page.get_by_role("button", name="Re-run with 1 new decision").first)
    assert "/compare?" in page.url
    _click_and_wait(page, page.locator("form.sign-out").get_by_role("button", name="Sign out"))
    assert page.url.startswith(base_url + "/sign-in")
    assert browser_problems(page) == []
    tom.close()

    # the surveyor in responsible charge signs in, reviews and approves run #2
    sam = browser.new_context(accept_downloads=True, viewport={"width": 1366, "height": 900})
    page = sam.new_page()
    page.console_messages = []  # type: ignore[attr-defined]
    page.on("console", lambda m: page.console_messages.append(f"{m.type}: {m.text}"))
    _sign_in(page, base_url, "sam")
    _click_and_wait(page, page.locator(f"a[href='{project_url[len(base_url) :]}']").first)
    _click_and_wait(page, page.get_by_role("link", name=re.compile(r"^Review observations")))
    trail = page.locator("#trail").inner_text()
    assert "tom (technician) proposed a decision on line" in trail
    assert "staff misread at M4" in trail
    _click_and_wait(page, page.get_by_role("button", name="Approve run #2 for issue"))
    approval = page.locator("#approval").inner_text()
    assert re.search(
        r"Approved for issue by sam on \d{4}-\d{2}-\d{2}, run #2, field book SHA-256 [0-9a-f]{64}",
        approval,
    )
    assert "Run #2 is frozen" in approval
    assert (
        "sam (surveyor in responsible charge) approved for issue run #2"
        in page.locator("#trail").inner_text()
    )
    page.screenshot(path="/tmp/office-approved-review.png", full_page=True)

    page.goto(project_url)
    with page.expect_download() as info:
        page.get_by_role("link", name="Report (HTML)").click()
    report = tmp_path / "report.html"
    info.value.save_as(report)
    assert "Approved for issue by sam on" in report.read_text()
    assert browser_problems(page) == []
    sam.close()
