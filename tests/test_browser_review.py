"""The review flow in a real browser: two blunders found, decided, re-run, compared, downloaded.

Drives the system chromium through Playwright against uvicorn serving a fresh
data folder, clicking through the real pages only.  Skipped only when
chromium is not installed; CI installs it.
"""

from __future__ import annotations

import re

import pytest

from tests.browser_support import browser_problems
from tests.test_review import TWO_BLUNDERS, leveling_with_blunders

pytestmark = pytest.mark.browser

TEXT = leveling_with_blunders(TWO_BLUNDERS)
FIRST = next(k for k, line in enumerate(TEXT.splitlines(), 1) if line.startswith("level M2 M4"))
SECOND = next(k for k, line in enumerate(TEXT.splitlines(), 1) if line.startswith("level M6 M7"))


def _upload(page, base_url: str, tmp_path) -> None:
    book = tmp_path / "two-blunders.fieldbook"
    book.write_text(TEXT)
    page.goto(base_url + "/")
    page.set_input_files("input#fieldbook", str(book))
    with page.expect_navigation():
        page.get_by_role("button", name="Adjust").click()


def _click_and_wait(page, locator) -> None:
    with page.expect_navigation():
        locator.click()


def test_two_blunders_found_decided_rerun_compared_and_downloaded(page, base_url, tmp_path):
    _upload(page, base_url, tmp_path)
    assert "Fails" in page.locator(".verdict").inner_text()
    _click_and_wait(page, page.get_by_role("link", name=re.compile(r"^Review observations")))
    assert page.url.endswith("/review")

    # the worst observation comes first; leave it out with a reason
    worst = page.locator("tbody.obs").first
    assert worst.get_attribute("id") == f"line-{FIRST}"
    assert "level M2 M4" in worst.locator("code.source-line").inner_text()
    worst.locator("summary").click()
    assert worst.get_by_label("Leave out").is_checked()
    worst.get_by_role("button", name="Queue decision").click()  # no reason: the browser refuses
    assert page.locator(".tag-queued").count() == 0
    worst.get_by_label(re.compile(r"^Reason")).fill("staff misread at M4, re-measured")
    _click_and_wait(page, worst.get_by_role("button", name="Queue decision"))
    assert "Queued: leave out" in page.locator(f"#line-{FIRST}").inner_text()
    page.screenshot(path="/tmp/review-page.png", full_page=True)

    # re-run: the comparison shows the cleared flag and the shifts
    _click_and_wait(page, page.get_by_role("button", name="Re-run with 1 new decision").first)
    assert "/compare?" in page.url
    assert page.locator(f"#flags-cleared tr[data-line='{FIRST}']").is_visible()
    assert page.locator(f"#flags-still tr[data-line='{SECOND}']").is_visible()
    shifts = [abs(float(t)) for t in page.locator("#shifts tbody td.strong").all_inner_texts()]
    assert shifts and shifts == sorted(shifts, reverse=True)
    page.screenshot(path="/tmp/review-compare.png", full_page=True)

    # the next snooping step is the second blunder; accept it with its suggested reason
    _click_and_wait(page, page.get_by_role("link", name="Back to the review"))
    _click_and_wait(page, page.get_by_role("button", name="Suggest a sequence"))
    step = page.locator("li.step").first
    assert f"line {SECOND}" in step.inner_text()
    reason = step.get_by_label("Reason")
    assert re.fullmatch(r"data snooping step 1: \|w\| = \d+\.\d\d", reason.input_value())
    _click_and_wait(page, step.get_by_role("button", name="Accept step 1"))
    assert "Accepted" in page.locator("li.step").first.inner_text()
    page.locator("#snooping").screenshot(path="/tmp/review-suggest.png")

    _click_and_wait(page, page.get_by_role("button", name="Re-run with 1 new decision").first)
    verdict = page.locator(".verdict")
    assert "Passes" in verdict.inner_text() and "verdict-pass" in verdict.get_attribute("class")
    assert page.locator(f"#flags-cleared tr[data-line='{SECOND}']").is_visible()

    # the field book with both decisions, each with its reason and date, and the report
    with page.expect_download() as info:
        page.get_by_role("link", name="Field book with decisions").click()
    download = info.value
    assert download.suggested_filename == "two-blunders-edited.fieldbook"
    target = tmp_path / download.suggested_filename
    download.save_as(target)
    lines = target.read_text().splitlines()
    assert len(lines) == len(TEXT.splitlines())
    assert re.search(
        r" ignore  # \d{4}-\d{2}-\d{2} left out: staff misread at M4", lines[FIRST - 1]
    )
    assert re.search(
        r" ignore  # \d{4}-\d{2}-\d{2} left out: data snooping step 1", lines[SECOND - 1]
    )
    with page.expect_download() as report_info:
        page.get_by_role("link", name="Report (HTML)").click()
    report_path = tmp_path / "report.html"
    report_info.value.save_as(report_path)
    assert "Passes" in report_path.read_text()

    assert browser_problems(page) == []


def test_delete_from_the_project_list_after_confirming(page, base_url, tmp_path):
    _upload(page, base_url, tmp_path)
    project_url = page.url
    page.goto(base_url + "/projects")
    row = page.locator("tr", has=page.locator(f"a[href='{project_url[len(base_url) :]}']"))
    _click_and_wait(page, row.get_by_role("button", name=re.compile("^Delete")))
    assert "Delete “two-blunders.fieldbook”?" in page.locator("h1").inner_text()
    _click_and_wait(page, page.get_by_role("button", name="Delete", exact=True))
    assert page.url == base_url + "/projects"
    assert page.locator(f"a[href='{project_url[len(base_url) :]}']").count() == 0
    assert page.goto(project_url).status == 404
    page.goto(base_url + "/deleted-projects")  # kept for 30 days: it can be restored
    _click_and_wait(page, page.get_by_role("button", name="Restore two-blunders.fieldbook"))
    assert page.url == project_url
    assert [m for m in browser_problems(page) if "404" not in m] == []


def test_a_misbooked_value_corrected_in_the_review_and_compared(page, base_url, tmp_path):
    _upload(page, base_url, tmp_path)
    _click_and_wait(page, page.get_by_role("link", name=re.compile(r"^Review observations")))
    worst = page.locator(f"#line-{FIRST}")
    booked = TEXT.splitlines()[FIRST - 1].split()[3]
    right = f"{float(booked) - 0.015:+.5f}"  # the injected blunder is +15 mm
    worst.locator("summary").click()
    value = worst.get_by_label(re.compile(r"^Corrected value for line"))
    assert value.get_attribute("placeholder") == booked  # the value it replaces
    value.fill(right)  # typing a value chooses "correct the value" (static/review.js)
    assert worst.get_by_label("Correct the value to").is_checked()
    worst.get_by_label(re.compile(r"^Reason")).fill("rod read 15 mm high")
    worst.screenshot(path="/tmp/review-correct-form.png")
    _click_and_wait(page, worst.get_by_role("button", name="Queue decision"))
    assert (
        f"Queued: correct the value from {booked} to {right}"
        in page.locator(f"#line-{FIRST}").inner_text()
    )
    assert "rod read 15 mm high" in page.locator("#decisions").inner_text()

    _click_and_wait(page, page.get_by_role("button", name="Re-run with 1 new decision").first)
    assert "/compare?" in page.url
    row = page.locator(f"#corrected tr[data-line='{FIRST}']")
    assert row.is_visible()
    cells = row.locator("td").all_inner_texts()
    assert cells[2:4] == [f"{float(booked):.4f}", f"{float(right):.4f}"]
    assert page.locator(f"#flags-cleared tr[data-line='{FIRST}']").is_visible()
    made = page.locator("#made-heading + ol").inner_text()
    assert f"Correct the value from {booked} to {right}" in made
    page.screenshot(path="/tmp/review-correct-compare.png", full_page=True)
    assert browser_problems(page) == []
