"""The network plot in a real browser: symbols, detail panel, exaggeration, zoom, flags.

Uses the uvicorn server, system chromium and console watch of tests/test_browser.py;
skipped only when chromium is not installed.
"""

from __future__ import annotations

import re

import pytest

from tests.browser_support import browser_problems

pytestmark = pytest.mark.browser

X10000, X20000 = "×10\u2009000", "×20\u2009000"  # the factor as shown, thin space
DIRECTION_BLUNDER_LINE = 94  # tools/DEMOS.md: direction Q13 -> Q15 in the round at Q13, +30″


def _open_demo(page, base_url: str, name: str) -> None:
    page.goto(base_url + "/")
    page.locator(f'form[action="/demos/{name}"] button').click()
    page.wait_for_url(f"{base_url}/projects/*")
    page.locator("#np-map").scroll_into_view_if_needed()
    page.wait_for_function(
        "document.querySelector('.np-toolbar') && !document.querySelector('.np-toolbar').hidden"
    )


def _view_box(page) -> list[float]:
    return [float(v) for v in page.locator("#np-map").get_attribute("viewBox").split()]


def _point(page, name: str):
    return page.locator(
        ".np-pt", has=page.locator("text.np-label", has_text=re.compile(rf"^{re.escape(name)}$"))
    )


def _table_row(page, name: str) -> list[str]:
    row = page.locator(
        "#points tbody tr", has=page.locator("th", has_text=re.compile(rf"^{re.escape(name)}$"))
    )
    return row.locator("td").all_inner_texts()


def test_control_network_plot_panel_exaggeration_and_zoom(page, base_url):
    _open_demo(page, base_url, "control_network")
    svg = page.locator("#np-map")
    # every point of the table has a symbol: 26 points, 3 held fixed (tools/DEMOS.md)
    assert page.locator("#points tbody tr").count() == 26
    assert svg.locator(".np-pt").count() == 26
    assert svg.locator(".np-pt-fixed").count() == 3
    assert svg.locator(".np-ell").count() == 23  # one per adjusted point

    # a point's figures in the side panel are the ones in the points table
    _point(page, "LF-107").locator(".np-hit").click()
    panel = page.locator("#np-panel-body")
    assert panel.locator(".np-panel-name").inner_text() == "LF-107"
    east, north = _table_row(page, "LF-107")[:2]
    text = panel.inner_text()
    assert f"{east} m" in text and f"{north} m" in text
    assert "Ellipse a (95%)" in text

    # more exaggeration: the ellipses grow by the factor and the bar label follows
    point_id = _point(page, "LF-107").get_attribute("data-point")
    ellipse = svg.locator(f'.np-ell[data-point="{point_id}"]')
    ry_before = float(ellipse.get_attribute("ry"))
    label_before = page.locator("#np-ellbar-label").text_content()
    output_before = page.locator("#np-exag-value").text_content()
    page.get_by_role("button", name="Larger ellipses").click()
    ry_after = float(ellipse.get_attribute("ry"))
    label_after = page.locator("#np-ellbar-label").text_content()
    output_after = page.locator("#np-exag-value").text_content()
    factor = {X10000: 10000, X20000: 20000}
    assert (output_before, output_after) == (X10000, X20000)
    assert ry_after / ry_before == pytest.approx(factor[output_after] / factor[output_before])
    assert label_after != label_before and label_after.endswith(f"({X20000})")
    # the ellipse bar is as long on screen as its length times the factor at the map's scale
    bar = page.locator("#np-ellbar")
    per_px = _view_box(page)[2] / svg.bounding_box()["width"]
    assert float(bar.get_attribute("data-px")) * per_px == pytest.approx(
        float(bar.get_attribute("data-length")) * 20000, rel=1e-3
    )
    # the slider moves the same factor, by keyboard too
    page.locator("#np-exag").focus()
    page.keyboard.press("ArrowLeft")
    assert page.locator("#np-exag-value").text_content() == X10000
    assert float(ellipse.get_attribute("ry")) == pytest.approx(ry_before)

    # zoom in: the viewBox shrinks, the symbols keep their size on screen
    symbol = _point(page, "HARROW").locator("rect")
    size_before = symbol.bounding_box()["width"]
    view_before = _view_box(page)
    page.get_by_role("button", name="Zoom in").click()
    view_after = _view_box(page)
    assert view_after[2] == pytest.approx(view_before[2] / 1.6, rel=1e-6)
    assert symbol.bounding_box()["width"] == pytest.approx(size_before, abs=0.5)
    # and the map scale bar still tells the truth
    map_label = page.locator("#np-mapbar-label")
    bar_px = float(page.locator(".np-mapbar-back").get_attribute("width")) - 1
    per_px = view_after[2] / svg.bounding_box()["width"]
    assert bar_px * per_px == pytest.approx(float(map_label.get_attribute("data-length")), rel=1e-3)

    # drag pans; Fit shows the whole network again
    box = svg.bounding_box()
    page.mouse.move(box["x"] + 40, box["y"] + box["height"] - 120)
    page.mouse.down()
    page.mouse.move(box["x"] + 140, box["y"] + box["height"] - 60, steps=5)
    page.mouse.up()
    panned = _view_box(page)
    assert panned[0] < view_after[0] and panned[1] < view_after[1]
    page.get_by_role("button", name="Fit").click()
    assert _view_box(page)[2] == pytest.approx(view_before[2], rel=1e-6)

    assert browser_problems(page) == []


def test_direction_blunder_line_is_flagged_and_opens_from_the_keyboard(page, base_url):
    _open_demo(page, base_url, "network_direction_blunder")
    svg = page.locator("#np-map")
    assert svg.locator(".np-pt").count() == 19
    line = svg.locator(
        ".np-ln.is-flagged",
        has=page.locator("title", has_text=re.compile(r"^(Q13 – Q15|Q15 – Q13):")),
    )
    assert line.count() == 1
    line_id = line.get_attribute("data-line")
    # marked by more than colour: a dashed highlight and a flag at the middle of the line
    assert line.locator(".np-halo").get_attribute("stroke-dasharray")
    assert svg.locator(f'.np-mark-flag[data-line="{line_id}"]').count() == 1
    assert svg.locator(".np-ln:not(.is-flagged) .np-halo").count() == 0

    line.focus()
    page.keyboard.press("Enter")
    panel = page.locator("#np-panel-body")
    item = panel.locator(
        ".np-obs li", has=page.get_by_text(f"line {DIRECTION_BLUNDER_LINE}", exact=True)
    )
    assert item.count() == 1
    assert "Flagged" in item.inner_text() and "Q13 → Q15" in item.inner_text()
    assert "Relative precision" in panel.inner_text()
    assert "is-selected" in (line.get_attribute("class") or "")

    # the panel's line number leads to the row of the observations table
    item.get_by_role("button", name=f"line {DIRECTION_BLUNDER_LINE}").click()
    row = page.locator(f'#observations-table tr[data-line="{DIRECTION_BLUNDER_LINE}"]')
    assert "np-located" in (row.get_attribute("class") or "")
    assert row.is_visible()

    page.locator("#network-plot").screenshot(path="/tmp/plot-browser-blunder.png")
    assert browser_problems(page) == []
