"""Long tables on the results page come a page at a time; the downloads keep every row."""

from __future__ import annotations

import re
import time
import warnings
from pathlib import Path

import numpy as np
import pytest

from server.report import tables as report
from server.web import create_app
from tests.synthetic import leveling_grid

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"
BLUNDER_LINE = 38  # tools/DEMOS.md: the blunder of the leveling demo
SIDE = 23  # 529 marks and 2 * 23 * 22 = 1012 level runs: three observation pages, two point pages


def _grid_with_blunder() -> tuple[str, int]:
    """The synthetic grid with +50 mm on one of the last level runs (on page 3 in file order)."""
    lines = leveling_grid(np.random.default_rng(12), side=SIDE).splitlines()
    index = len(lines) - 3
    words = lines[index].split()
    words[3] = f"{float(words[3]) + 0.050:+.5f}"
    lines[index] = " ".join(words)
    return "\n".join(lines) + "\n", index + 1


@pytest.fixture(scope="module")
def grid(tmp_path_factory):
    text, line = _grid_with_blunder()
    app = create_app(tmp_path_factory.mktemp("paging") / "data")
    with TestClient(app) as client:
        response = client.post("/projects", data={"text": text}, follow_redirects=False)
        assert response.status_code == 303, response.text
        url = response.headers["location"]
        for _ in range(600):  # a large run may be adjusted in the background
            html = client.get(url).text
            if 'id="observations-table"' in html:
                break
            time.sleep(0.1)
        yield client, url, line


def _observation_lines(html: str) -> list[int]:
    table = html.split('id="observations-table"', 1)[1].split("</table>", 1)[0]
    return [int(n) for n in re.findall(r'<tr class="[^"]*" data-line="(\d+)">', table)]


def _point_rows(html: str) -> int:
    section = html.split('id="points"', 1)[1].split("</table>", 1)[0]
    return len(re.findall(r'<th scope="row" class="mark">', section))


def test_page_arithmetic_clamps_to_the_pages_there_are():
    assert report.page(1012, 1).window == slice(0, 500)
    assert report.page(1012, 3).window == slice(1000, 1012)
    assert report.page(1012, 99).number == 3  # too large: the last page
    assert report.page(1012, -4).number == 1
    assert report.page(0, 1).count == 1 and not report.page(0, 1).paged
    assert not report.page(500, 1).paged and report.page(501, 1).paged
    assert report.page(16240, 1).label == "rows 1–500 of 16,240"


def test_first_page_holds_the_page_size_and_the_next_page_the_rest(grid):
    client, url, _ = grid
    first = client.get(url).text
    lines = _observation_lines(first)
    assert len(lines) == report.PAGE_SIZE == 500
    assert "rows 1–500 of 1,012" in first
    assert "page 1 of 3" in first
    second = _observation_lines(client.get(url + "?obs_page=2").text)
    third = _observation_lines(client.get(url + "?obs_page=3").text)
    assert len(second) == 500 and len(third) == 12
    everything = lines + second + third
    assert len(set(everything)) == 1012 and everything == sorted(everything)  # file order kept
    assert _point_rows(first) == 500
    assert _point_rows(client.get(url + "?pt_page=2").text) == SIDE * SIDE - 500


def test_links_keep_the_other_parameters(grid):
    client, url, _ = grid
    html = client.get(url + "?pt_page=2&obs_page=2").text
    assert f'href="{url}?pt_page=2&amp;obs_page=1#observations"' in html
    assert f'href="{url}?pt_page=2&amp;obs_page=3#observations"' in html
    assert f'href="{url}?pt_page=1&amp;obs_page=2#points"' in html
    assert "rows 501–529 of 529" in html


@pytest.mark.parametrize("value", ["0", "-1", "abc", "3.5", "99999999999999999999", "", "%00"])
def test_bad_page_values_never_fail(grid, value):
    client, url, _ = grid
    response = client.get(f"{url}?obs_page={value}&pt_page={value}")
    assert response.status_code == 200
    assert len(_observation_lines(response.text)) in (500, 12)


def test_too_large_a_page_shows_the_last(grid):
    client, url, _ = grid
    html = client.get(url + "?obs_page=50").text
    assert len(_observation_lines(html)) == 12 and "page 3 of 3" in html


def test_flagged_observation_on_a_later_page_is_named_on_the_first(grid):
    client, url, line = grid
    first = client.get(url).text
    assert line not in _observation_lines(first)
    listed = re.search(r'id="flagged-lines">(.*?)</p>', first, re.S)
    assert listed is not None and re.search(rf"\b{line}\b", listed.group(1))
    third = client.get(url + "?obs_page=3").text
    assert re.search(rf'<tr class="is-flagged" data-line="{line}">', third)


def test_downloads_keep_every_row(grid):
    client, url, _ = grid
    data = client.get(url + "/result.json").json()
    assert len(data["observations"]) == 1012 and len(data["points"]) == SIDE * SIDE
    report_html = client.get(url + "/report.html?obs_page=2&pt_page=2").text
    # the report's observation rows (the page parameters are ignored there)
    assert len(re.findall(r'<tr class="(?:is-flagged|is-ignored|)">', report_html)) == 1012


def test_small_demo_shows_no_pager(tmp_path):
    with TestClient(create_app(tmp_path / "data")) as client:
        text = (DEMOS / "leveling_blunder.fieldbook").read_text()
        response = client.post("/projects", data={"text": text}, follow_redirects=False)
        url = response.headers["location"]
        html = client.get(url).text
        assert 'class="pager"' not in html and 'id="flagged-lines"' not in html
        assert html == client.get(url + "?obs_page=7&pt_page=2").text.replace(
            "?obs_page=7&amp;pt_page=2", ""
        )  # the parameters change nothing
        review = client.get(url + "/review").text
        assert 'class="pager"' not in review and f'data-line="{BLUNDER_LINE}"' in review


def _review_lines(html: str) -> list[int]:
    table = html.split('class="data review-table"', 1)[1].split("</table>", 1)[0]
    return [int(n) for n in re.findall(r'id="line-(\d+)"', table)]


def test_review_page_pages_with_the_flagged_first(grid):
    client, url, line = grid
    first = client.get(url + "/review").text
    lines = _review_lines(first)
    assert len(lines) == 500 and lines[0] == line  # the flagged run leads page 1
    assert "rows 1–500 of 1,012" in first
    assert f'href="{url}/review?obs_page=2#observations"' in first
    rest = _review_lines(client.get(url + "/review?obs_page=2").text)
    last = _review_lines(client.get(url + "/review?obs_page=abc9").text)
    assert len(rest) == 500 and len(last) == 500 and last == lines  # unreadable: page 1
    tail = _review_lines(client.get(url + "/review?obs_page=9").text)
    assert len(tail) == 12
    assert len(set(lines + rest + tail)) == 1012


def test_a_decision_on_a_later_page_comes_back_to_that_page(grid):
    """Runs last in this file: it queues a decision on the shared project."""
    client, url, _ = grid
    second = client.get(url + "/review?obs_page=2").text
    line = _review_lines(second)[0]
    token = re.search(r'name="token" value="([0-9a-f]{32})"', second).group(1)
    refused = client.post(
        url + "/edits",
        follow_redirects=False,
        data={"token": token, "line": str(line), "action": "bogus"},
    )
    assert refused.status_code != 500
    assert line in _review_lines(refused.text)  # the refusal is drawn beside its line
    assert f'href="{url}/review?obs_page=1#observations"' in refused.text
    done = client.post(
        url + "/edits",
        follow_redirects=False,
        data={"token": token, "line": str(line), "action": "exclude", "reason": "synthetic check"},
    )
    assert done.status_code == 303
    assert done.headers["location"].endswith(f"/review?obs_page=2#line-{line}")
