"""Hostile names in a real browser: no script runs, nothing breaks the content security policy.

A project whose point is named ``<script>alert(1)</script>``, whose title
closes the ``<title>`` element and opens a script, whose notes carry event
handlers and whose review decision has a scripted reason is opened in headless
chromium on every page that shows those strings.  The test listens for
dialogs (``alert`` would open one), collects every CSP violation the page
reports (``securitypolicyviolation`` events and console messages), and reads
the DOM: the strings must be there as text, and the only scripts are the
service's own files.  Drives the system chromium (never a downloaded browser)
against uvicorn on 127.0.0.1.
"""

from __future__ import annotations

import re
from pathlib import Path

import httpx
import pytest

from tests.test_web_security import HOSTILE_BOOK, HOSTILE_PLOT, SCRIPT

pytestmark = pytest.mark.browser

REASON = '<script>alert(6)</script> "crew said" </textarea>'
WATCH_CSP = """
window.__csp = [];
document.addEventListener('securitypolicyviolation',
    e => window.__csp.push(e.violatedDirective + ' ' + e.blockedURI));
"""


@pytest.fixture(scope="module")
def hostile_project(base_url: str) -> str:
    """The hostile field book stored, with one decision carrying a hostile reason, re-run."""
    with httpx.Client(base_url=base_url, timeout=60) as http:
        created = http.post(
            "/api/projects", files={"fieldbook": ("<b>x</b>.fieldbook", HOSTILE_BOOK)}
        )
        assert created.status_code == 201, created.text
        project_id = created.json()["id"]
        review = http.get(f"/projects/{project_id}/review").text
        token = re.search(r'name="token" value="([0-9a-f]+)"', review).group(1)
        queued = http.post(
            f"/projects/{project_id}/edits",
            data={"token": token, "line": "9", "action": "exclude", "reason": REASON},
        )
        assert queued.status_code == 303, queued.text[:1000]
        rerun = http.post(f"/projects/{project_id}/runs", data={"token": token})
        assert rerun.status_code == 303, rerun.text[:1000]
    return project_id


@pytest.fixture(scope="module")
def plotted_project(base_url: str) -> str:
    """A horizontal network with hostile names, drawn in the SVG plot."""
    created = httpx.post(
        f"{base_url}/api/projects",
        timeout=60,
        files={"fieldbook": ("plot.fieldbook", HOSTILE_PLOT)},
    )
    assert created.status_code == 201 and created.json()["result"], created.text
    return created.json()["id"]


@pytest.fixture
def page(browser):
    context = browser.new_context(viewport={"width": 1280, "height": 900})
    page = context.new_page()
    page.dialogs = []  # type: ignore[attr-defined]
    page.console_messages = []  # type: ignore[attr-defined]

    def on_dialog(dialog) -> None:
        page.dialogs.append(dialog.message)
        dialog.dismiss()

    page.on("dialog", on_dialog)
    page.on("console", lambda m: page.console_messages.append(f"{m.type}: {m.text}"))
    page.on("pageerror", lambda e: page.console_messages.append(f"pageerror: {e}"))
    page.add_init_script(WATCH_CSP)
    yield page
    context.close()


def _csp_problems(page, status: int = 200) -> list[str]:
    reported = page.evaluate("window.__csp || []")
    expected = f"Failed to load resource: the server responded with a status of {status}"
    console = [
        m
        for m in page.console_messages
        if (
            "Content Security Policy" in m
            or "Refused to" in m
            or m.startswith(("error", "pageerror"))
        )
        and expected not in m
    ]
    return [*reported, *console]


def _check_page(page, url: str) -> None:
    response = page.goto(url)
    assert response is not None and response.status < 500, url
    page.wait_for_load_state("load")
    page.wait_for_timeout(150)  # let deferred scripts and any injected handler fire
    assert page.dialogs == [], (url, page.dialogs)
    sources = page.evaluate(  # JSON data blocks are not scripts; everything else is a file
        "Array.from(document.scripts).filter(s => s.type !== 'application/json').map(s => s.src)"
    )
    assert all(
        re.match(r"^http://127\.0\.0\.1:\d+/static/[\w.-]+\.js(\?.*)?$", s) for s in sources
    ), (url, sources)
    planted = page.locator("img[src='x'], iframe, svg[onload], b").count()
    assert planted == 0, url
    assert page.evaluate("typeof window.alert") == "function"  # nothing replaced it
    assert _csp_problems(page, response.status) == [], url


def test_hostile_strings_run_no_script_on_any_page(
    page, base_url, hostile_project, plotted_project
):
    project = f"{base_url}/projects/{hostile_project}"
    plotted = f"{base_url}/projects/{plotted_project}"
    for url in (
        f"{base_url}/",
        f"{base_url}/projects",
        project,
        f"{project}/review",
        f"{project}/compare",
        plotted,
        f"{plotted}/review",
        f"{base_url}/projects/{'f' * 32}",
    ):
        _check_page(page, url)

    page.goto(project)
    body = page.locator("body").inner_text()
    assert SCRIPT in body  # the name is shown to the surveyor, as text
    assert "</title><script>alert(2)</script>" in page.title()

    page.goto(plotted)
    labels = page.locator("svg text.np-label").all_text_contents()
    assert SCRIPT in labels and "<b>C</b>" in labels, labels  # drawn as text in the plot
    assert page.dialogs == []

    page.goto(f"{project}/review")
    assert '<script>alert(6)</script> "crew said"' in page.locator("body").inner_text()


def test_downloaded_report_runs_no_script_when_opened(
    page, base_url, hostile_project, tmp_path: Path
):
    report = httpx.get(f"{base_url}/projects/{hostile_project}/report.html", timeout=60)
    assert report.status_code == 200
    path = tmp_path / "report.html"
    path.write_bytes(report.content)
    page.goto(path.as_uri())
    page.wait_for_timeout(150)
    assert page.dialogs == []
    assert page.evaluate("document.scripts.length") == 0
    assert page.locator("img[src='x'], iframe, svg[onload]").count() == 0
    assert SCRIPT in page.locator("body").inner_text()
    assert "</title><script>alert(2)</script>" in page.title()
    assert _csp_problems(page) == []
