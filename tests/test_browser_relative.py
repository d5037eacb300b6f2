"""The relative-precision picker in a real browser: add pairs, queue them, re-run, see them checked.

Same harness as ``tests/test_browser_review.py`` (system chromium through
Playwright against uvicorn); skipped only when chromium is not installed.
"""

from __future__ import annotations

import re

import pytest

from tests.browser_support import browser_problems
from tests.test_relative_pairs import boundary_text

pytestmark = pytest.mark.browser

TEXT = boundary_text()


def _click_and_wait(page, locator) -> None:
    with page.expect_navigation():
        locator.click()


def test_pairs_picked_on_the_results_page_are_reported_after_the_rerun(page, base_url, tmp_path):
    book = tmp_path / "lot14.fieldbook"
    book.write_text(TEXT)
    page.goto(base_url + "/")
    page.set_input_files("input#fieldbook", str(book))
    with page.expect_navigation():
        page.get_by_role("button", name="Adjust").click()
    picker = page.locator("#relative-picker")
    assert "8 joined pairs within the allowance" in page.locator("#standards").inner_text()

    # two pairs added one by one with the script; one of them twice (kept once)
    for a, b in (("K1", "K2"), ("K2", "K3"), ("K2", "K1")):
        picker.get_by_label("From").select_option(a)
        picker.get_by_label("To", exact=True).select_option(b)
        picker.get_by_role("button", name="Add pair").click()
    assert picker.locator("[data-relative-list] li").all_inner_texts() == [
        "K1–K2 Remove",
        "K2–K3 Remove",
    ]
    # the same point twice is refused in the browser
    picker.get_by_label("From").select_option("K3")
    picker.get_by_label("To", exact=True).select_option("K3")
    picker.get_by_role("button", name="Add pair").click()
    assert picker.locator("[data-relative-list] li").count() == 2
    picker.get_by_label("From").select_option("")
    picker.get_by_label("To", exact=True).select_option("")
    # and all pairs among K3, K4 and K1
    picker.get_by_label("Points").select_option(["K3", "K4", "K1"])
    picker.get_by_label(re.compile(r"^Reason")).fill("client: 2 cm + 50 ppm between corners")
    _click_and_wait(page, picker.get_by_role("button", name="Queue these pairs"))
    assert page.url.endswith("/review#decisions")
    assert "Report the relative precision of 5 pairs" in page.locator("#decisions").inner_text()

    _click_and_wait(page, page.get_by_role("button", name="Re-run with 1 new decision").first)
    page.goto(page.url.split("/compare")[0])
    standards = page.locator("#standards").inner_text()
    assert "8 joined pairs and 5 requested pairs" in standards
    rows = page.locator("#relative tbody tr")
    requested = [r for r in rows.all_text_contents() if "requested" in r]  # in a closed <details>
    assert len(requested) == 5
    page.screenshot(path="/tmp/relative-picker.png", full_page=True)
    assert browser_problems(page) == []
