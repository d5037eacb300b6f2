"""A geodetic 3D job in a real browser: upload the dam demo with one bad baseline component,
read the model and its assumptions, the geodetic coordinates and the failing baseline test,
and see baselines drawn apart from terrestrial lines in the plot.

Drives the system chromium through Playwright (see tests/test_browser.py).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.browser_support import browser_problems

pytestmark = pytest.mark.browser

BLUNDER = Path(__file__).resolve().parents[1] / "demo_projects" / "dam_control_3d_blunder.fieldbook"
BLUNDER_LINE = 48  # tools/GEODETIC_DEMOS.md: +45 mm in dy of baseline GN-WEIR P-4


def test_a_geodetic_upload_shows_its_model_coordinates_and_baseline_test(page, base_url):
    page.goto(base_url + "/")
    page.set_input_files("input#fieldbook", str(BLUNDER))
    page.get_by_role("button", name="Adjust").click()
    page.wait_for_url(f"{base_url}/projects/*")

    model = page.locator("#geodetic-model").inner_text()
    assert "EPSG:32633" in model and "0.13" in model  # the CRS and k in force
    assert "deflection" in page.content().lower()  # the zero-deflection assumption is stated

    points = page.locator("#geodetic-points tbody tr")
    assert points.count() >= 8
    first = points.first.inner_text()
    assert "47.9" in first and "13.6" in first  # latitude and longitude in decimal degrees

    flagged = page.locator("#baseline-tests tbody tr.is-flagged")
    assert flagged.count() == 1
    assert flagged.first.locator("td").first.inner_text() == str(BLUNDER_LINE)
    assert "Flagged" in flagged.first.inner_text()  # in words, not colour alone

    observations = page.locator("#observations-table tbody tr.is-flagged")
    texts = observations.all_inner_texts()
    assert any(t.startswith(str(BLUNDER_LINE)) and "dy" in t for t in texts)

    assert "GNSS baseline" in page.locator("body").inner_text()  # the plot's key
    assert browser_problems(page) == []
