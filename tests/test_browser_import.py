"""Importing survey XML in a real browser: upload, read the summary and the produced field
book, adjust with one press, find both files and their SHA-256 on the results page.

Debian's chromium through Playwright (tests/browser_support.py), skipped only when it is
not installed.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest

from tests.browser_support import browser_problems

pytestmark = pytest.mark.browser

MIXED = Path(__file__).resolve().parents[1] / "demo_projects" / "xml_mixed_job.xml"
ROUNDS = Path(__file__).resolve().parents[1] / "tests" / "data" / "heron_hill_rounds.xml"


def test_upload_xml_preview_adjust_and_both_hashes(page, base_url):
    page.goto(base_url + "/")
    page.set_input_files("input#fieldbook", str(MIXED))
    page.get_by_role("button", name="Adjust", exact=True).click()
    page.wait_for_url(f"{base_url}/projects/*/import")

    counts = page.locator(".import-counts")
    assert "Setups\n3" in counts.inner_text() and "GNSS vectors\n5" in counts.inner_text()
    book = page.locator("#fieldbook-text")
    assert book.is_visible() and "crs EPSG:25832" in book.inner_text()
    assert "No warnings" in page.locator(".import-summary").inner_text()

    page.get_by_role("button", name="Adjust this field book").click()
    page.wait_for_url(f"{base_url}/projects/*")
    page.wait_for_selector(".verdict")
    assert "Passes" in page.locator(".verdict").inner_text()

    meta = page.locator(".meta").inner_text()
    xml_hash = hashlib.sha256(MIXED.read_bytes()).hexdigest()  # reference: hashlib
    assert "xml_mixed_job.xml" in meta and xml_hash in meta
    assert "xml_mixed_job.fieldbook" in meta
    book_hash = page.locator(".meta .hash").first.inner_text()
    assert len(book_hash) == 64 and book_hash != xml_hash
    assert browser_problems(page) == []


def test_warnings_name_their_line_and_going_back_returns_to_the_upload(page, base_url):
    page.goto(base_url + "/")
    page.set_input_files("input#fieldbook", str(ROUNDS))
    page.get_by_role("button", name="Adjust", exact=True).click()
    page.wait_for_url(f"{base_url}/projects/*/import")
    warnings = page.locator(".import-warnings li")
    assert warnings.count() == 1 and warnings.first.inner_text().startswith("XML line 28")
    page.get_by_role("button", name="Go back").click()
    page.wait_for_url(f"{base_url}/")
    assert browser_problems(page) == []


def test_bad_xml_shows_its_line(page, base_url, tmp_path):
    bad = tmp_path / "broken.xml"
    bad.write_bytes(b"<LandXML>\n<Units>\n</LandXML>\n")
    page.goto(base_url + "/")
    page.set_input_files("input#fieldbook", str(bad))
    page.get_by_role("button", name="Adjust", exact=True).click()
    page.wait_for_load_state()
    assert "The XML file could not be imported" in page.locator("h1").inner_text()
    assert "XML line 3" in page.locator(".issues").inner_text()
