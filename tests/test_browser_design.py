"""The design page in a real browser: a plan book opens on its design, and switching an
observation off re-evaluates the figures at once (static/design.js under the page's CSP)."""

from __future__ import annotations

from pathlib import Path

import pytest

from server.design.plan import plan_fieldbook
from server.report.design_tables import planned_rows, point_rows, relative_rows
from server.results.result import CAUTION
from tests.browser_support import browser_problems

pytestmark = pytest.mark.browser
expect = pytest.importorskip("playwright.sync_api").expect

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"
BOOK = DEMOS / "design" / "footbridge_design.fieldbook"
DISTANCE_LINE = 43  # distance W1 E1


def test_a_plan_book_opens_on_its_design_and_a_switch_re_evaluates(page, base_url):
    page.goto(base_url + "/")
    page.set_input_files("input#fieldbook", str(BOOK))
    page.get_by_role("button", name="Adjust").click()
    page.wait_for_url(f"{base_url}/projects/*/design")
    assert page.locator("footer").get_by_text(CAUTION).is_visible()
    page.wait_for_selector("#design-form[data-ready='1']")
    assert page.locator("#design-apply").is_hidden()  # the script re-evaluates at once

    # what the same book gives without line 43, from the design code directly
    text = BOOK.read_text(encoding="utf-8")
    expected = plan_fieldbook(text, switched_off={DISTANCE_LINE})
    e1 = next(p for p in point_rows(expected) if p.name == "E1")
    row_45 = next(o for o in planned_rows(expected) if o.line == 45)

    before = page.locator("#design-points tr[data-point='E1'] td").nth(0).inner_text()
    page.locator(f"tr[data-line='{DISTANCE_LINE}'] input[type=checkbox]").uncheck()
    row = page.locator(f"tr[data-line='{DISTANCE_LINE}']")
    expect(row.locator("[data-figure=note]")).to_have_text("switched off")
    assert row.locator("[data-figure=redundancy]").inner_text() == "—"
    cells = page.locator("#design-points tr[data-point='E1'] td")
    assert cells.nth(0).inner_text() == e1.sd_east
    assert cells.nth(3).inner_text() == e1.semi_major
    other = page.locator("tr[data-line='45']")
    assert other.locator("[data-figure=redundancy]").inner_text() == row_45.redundancy
    assert other.locator("[data-figure=external]").inner_text() == row_45.external
    assert "off=43" in (page.locator("#design-pdf").get_attribute("href") or "")
    relative = page.locator("#design-relative tbody tr")
    assert relative.count() == len(expected.relative)
    assert relative.first.locator("td").nth(2).inner_text() == relative_rows(expected)[0].semi_major

    page.locator(f"tr[data-line='{DISTANCE_LINE}'] input[type=checkbox]").check()
    expect(cells.nth(0)).to_have_text(before)
    expect(row.locator("[data-figure=note]")).not_to_have_text("switched off")
    assert browser_problems(page) == []
