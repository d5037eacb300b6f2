"""The results and review pages of a 2,000-observation project stay under 300 KB compressed.

The bytes of a page are deterministic for a given field book (no timestamps, no random
ids but the project's, which have a fixed length), so the budget of issue 16 is a plain
size check; the server time is measured by bench/pages.py, never here.
"""

from __future__ import annotations

import gzip
import json
import re
import sys
import time
import warnings
from pathlib import Path

import pytest
from markupsafe import escape

from server.results.result import CAUTION
from server.web import create_app

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "bench"))
import networks  # noqa: E402 - bench/networks.py: the benchmark field books

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

BUDGET_BYTES = 300_000  # compressed, as sent to a browser that accepts gzip (issue 16)


@pytest.fixture(scope="module")
def large(tmp_path_factory):
    """A grid survey of 361 points and 2,052 observations, stored and adjusted."""
    text = networks.horizontal(361, sparse=True, fixed_every=50)
    count = sum(1 for line in text.splitlines() if line.startswith(("  ", "distance")))
    assert count == 2052
    with TestClient(create_app(tmp_path_factory.mktemp("weight") / "data")) as client:
        response = client.post("/projects", data={"text": text}, follow_redirects=False)
        assert response.status_code == 303
        url = response.headers["location"]
        for _ in range(1200):  # adjusted in the background when it takes longer than a moment
            if 'id="observations-table"' in client.get(url).text:
                break
            time.sleep(0.1)
        yield client, url


@pytest.mark.parametrize("suffix", ["", "/review"])
def test_page_of_2000_observations_is_under_the_compressed_budget(large, suffix):
    client, url = large
    response = client.get(url + suffix, headers={"Accept-Encoding": "gzip"})
    assert response.status_code == 200
    assert response.headers["content-encoding"] == "gzip"
    sent = response.num_bytes_downloaded  # the compressed bytes on the wire
    assert sent == pytest.approx(len(gzip.compress(response.content, 6)), rel=0.02)
    assert sent < BUDGET_BYTES, f"{url + suffix}: {sent:,} bytes compressed"
    # the page is whole: the caution and the first page of the observations are there
    assert str(escape(CAUTION)) in response.text
    assert len(re.findall(r'data-line="\d+"', response.text)) >= 500


def test_plot_data_block_holds_no_geometry_the_svg_already_has(large):
    client, url = large
    page = client.get(url).text
    block = re.search(r'<script type="application/json" id="np-data">(.*?)</script>', page, re.S)
    assert block is not None
    data = json.loads(block.group(1))
    assert len(data["lines"]) == len(re.findall(r'<g class="np-ln ', page)) > 600
    line, point = data["lines"][0], data["points"][0]
    # drawn once, in the SVG: coordinates, titles, styles and symbols are not in the JSON
    assert not {"x1", "y1", "x2", "y2", "mx", "my", "title", "style"} & set(line)
    assert not {"x", "y", "title", "kind", "label"} & set(point)
    assert "ellipse" not in point  # its axes are the ellipse's data-a and data-b
    # what the side panel shows is: every observation of the network once, by line
    at = data["observation_keys"].index("line")
    lines = [o[at] for ln in data["lines"] for o in ln["detail"]]
    assert len(lines) == len(set(lines)) == 2052
    # a point's figures are values with the index of their labels, shared by the points
    labels = data["label_sets"][point["detail"][0]]
    assert labels[:3] == ["Role", "East", "North"] and len(labels) == len(point["detail"][1])
    assert len(data["label_sets"]) < 10
