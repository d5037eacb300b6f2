"""The results page in a real browser: upload, read the verdict, sort by |w|, download.

Drives the system chromium through Playwright (never a downloaded browser)
against uvicorn serving a fresh data folder.  Skipped only when chromium is
not installed; CI installs it.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

import pytest

from server.results.result import CAUTION
from tests.browser_support import browser_problems

pytestmark = pytest.mark.browser

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"
BLUNDER = DEMOS / "leveling_blunder.fieldbook"
BLUNDER_LINE = 38  # tools/DEMOS.md: +10 mm on level KR-106 KR-107


def test_upload_sort_by_w_and_download(page, base_url, tmp_path):
    page.goto(base_url + "/")
    assert page.locator("footer").get_by_text(CAUTION).is_visible()
    page.set_input_files("input#fieldbook", str(BLUNDER))
    page.get_by_role("button", name="Adjust").click()
    page.wait_for_url(f"{base_url}/projects/*")

    verdict = page.locator(".verdict")
    assert "Fails: residuals too large — look for blunders" in verdict.inner_text()
    assert page.locator("p.caution").is_visible()
    assert CAUTION in page.locator("p.caution").inner_text()

    rows = page.locator("#observations-table tbody tr")
    flagged = page.locator("#observations-table tbody tr.is-flagged")
    assert flagged.count() == 1
    assert flagged.first.locator("td").first.inner_text() == str(BLUNDER_LINE)
    assert "Flagged" in flagged.first.inner_text()  # marked in words, not colour alone
    assert rows.first.locator("td").first.inner_text() != str(BLUNDER_LINE)  # file order first

    page.locator("th[data-sort-key='w'] button").click()
    assert page.locator("th[data-sort-key='w']").get_attribute("aria-sort") == "descending"
    assert rows.first.locator("td").first.inner_text() == str(BLUNDER_LINE)
    assert "is-flagged" in (rows.first.get_attribute("class") or "")
    w_cells = page.locator("#observations-table tbody td.w").all_inner_texts()
    w_values = [abs(float(t)) for t in w_cells if t.strip() not in ("", "—")]
    assert w_values == sorted(w_values, reverse=True)

    page.locator("th[data-sort-key='line'] button").click()
    lines = [int(t) for t in rows.locator("td:first-child").all_inner_texts()]
    assert lines == sorted(lines)

    with page.expect_download() as download_info:
        page.get_by_role("link", name="Points (CSV)").click()
    download = download_info.value
    assert download.suggested_filename == "leveling_blunder-points.csv"
    target = tmp_path / download.suggested_filename
    download.save_as(target)
    names = {row["name"] for row in csv.DictReader(io.StringIO(target.read_text()))}
    assert {"BM-TANNERY", "KR-106", "KR-107"} <= names

    with page.expect_download() as report_info:
        page.get_by_role("link", name="Report (HTML)").click()
    report_path = tmp_path / "report.html"
    report_info.value.save_as(report_path)
    assert CAUTION in report_path.read_text()

    assert browser_problems(page) == []


def test_report_renders_under_its_own_csp(page, base_url, tmp_path):
    """The downloaded report is styled when opened, and nothing is blocked."""
    page.goto(base_url + "/")
    page.set_input_files("input#fieldbook", str(BLUNDER))
    page.get_by_role("button", name="Adjust").click()
    page.wait_for_url(f"{base_url}/projects/*")
    with page.expect_download() as info:
        page.get_by_role("link", name="Report (HTML)").click()
    path = tmp_path / "report.html"
    info.value.save_as(path)
    page.goto(path.as_uri())
    border = page.locator("h2").first.evaluate("e => getComputedStyle(e).borderBottomStyle")
    assert border == "solid"  # the inline stylesheet applied
    assert page.locator(".verdict-fail").is_visible()
    assert browser_problems(page) == []


def test_field_book_errors_in_the_browser(page, base_url):
    page.goto(base_url + "/")
    page.fill("textarea#text", "fieldbook 1\ndefaults level=1mm\nlevle A B 1.0\n")
    page.get_by_role("button", name="Adjust").click()
    page.wait_for_url(f"{base_url}/projects/*")
    issues = page.locator("ol.issues li")
    assert issues.count() == 1
    assert "Line 3" in issues.first.inner_text()
    assert "levle A B 1.0" in issues.first.inner_text()
    # nothing was adjusted: no adjustment time and no caution about results
    assert page.get_by_text(CAUTION).count() == 0
    assert "Adjusted" not in page.locator("dl.meta").inner_text()
    assert browser_problems(page) == []
    page.get_by_role("link", name="Projects").first.click()
    row = page.locator("tr.row-failed")
    assert row.count() == 1
    assert "Upload failed: field book errors" in row.inner_text()
    with page.expect_navigation():
        row.get_by_role("link", name="Errors").click()
    assert page.locator("ol.issues li").count() == 1


def test_results_page_screenshot(page, base_url):
    """Keeps a picture of the results page for review (not compared)."""
    page.goto(base_url + "/")
    page.set_input_files("input#fieldbook", str(BLUNDER))
    page.get_by_role("button", name="Adjust").click()
    page.wait_for_url(f"{base_url}/projects/*")
    page.screenshot(path="/tmp/stationfit-results.png")
    assert page.locator(".verdict-fail").is_visible()
    assert browser_problems(page) == []
