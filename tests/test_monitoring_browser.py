"""The monitoring page in a real browser: two epochs of a free 2D network uploaded, chosen,
compared; the displacement plot draws the moved pillar's vector and ellipses under the CSP."""

from __future__ import annotations

import pytest

from server.results.result import CAUTION
from tests.browser_support import browser_problems
from tests.test_monitoring_epochs import _trilateration

pytestmark = pytest.mark.browser


def _upload(page, base_url, path) -> None:
    page.goto(base_url + "/")
    page.set_input_files("input#fieldbook", str(path))
    page.get_by_role("button", name="Adjust").click()
    page.wait_for_url(f"{base_url}/projects/*")


def test_two_epochs_are_compared_and_drawn(page, base_url, tmp_path):
    january = tmp_path / "pillars-january.fieldbook"
    january.write_text(_trilateration("2026-01-10", {}, 1), encoding="utf-8")
    june = tmp_path / "pillars-june.fieldbook"
    june.write_text(_trilateration("2026-06-10", {"P3": (0.004, -0.003)}, 2), encoding="utf-8")
    for path in (january, june):
        _upload(page, base_url, path)

    page.goto(base_url + "/")
    page.get_by_role("link", name="Monitoring").click()
    page.wait_for_url(f"{base_url}/monitoring")
    for box in page.locator("input[name='project']").all():
        box.check()
    page.get_by_role("button", name="Compare").click()
    page.wait_for_url(f"{base_url}/monitoring?*")

    section = page.locator("#comparison-1")
    assert "Moved: P3" in section.locator(".moved-marks").inner_text()
    plot = section.locator("svg.displacement-svg")
    assert plot.is_visible()
    assert plot.locator("ellipse").count() == 5
    moved = plot.locator("g.is-moved")
    assert moved.count() == 1 and "P3" in (moved.text_content() or "")
    box = plot.bounding_box()
    assert box is not None and box["width"] > 300
    assert "Moved (significant)" in section.locator("table.displacements").inner_text()
    assert CAUTION in page.locator("p.caution").inner_text()
    page.screenshot(path=str(tmp_path / "monitoring.png"), full_page=True)
    assert browser_problems(page) == []
