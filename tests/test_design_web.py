"""The design page on the web service (no browser): a book of planned observations is stored
and designed, not adjusted; ``design.json`` re-evaluates with lines switched off; the form
works without script; the design reports carry the caution."""

from __future__ import annotations

import warnings
from pathlib import Path

import pytest

from server.design.plan import plan_fieldbook
from server.report.design_tables import design_figures
from server.results.result import CAUTION
from server.web import create_app

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2
    from fastapi.testclient import TestClient

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"
BOOK = DEMOS / "design" / "footbridge_design.fieldbook"
DIRECTIONS = [23, 24, 25, 26, 29, 30, 31, 34, 35, 36, 39, 40, 41]
DISTANCES = [43, 44, 45, 46, 47, 48, 49]


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    with TestClient(create_app(tmp_path_factory.mktemp("data"))) as c:
        yield c


@pytest.fixture(scope="module")
def design_url(client) -> str:
    upload = {"fieldbook": ("bridge.fieldbook", BOOK.read_bytes(), "text/plain")}
    response = client.post("/projects", files=upload, follow_redirects=False)
    assert response.status_code == 303
    project = response.headers["location"]
    page = client.get(project, follow_redirects=False)
    assert page.status_code == 303  # a design has no adjustment: its page is the design
    assert page.headers["location"] == project + "/design"
    return project + "/design"


def test_the_design_page_lists_every_planned_observation_with_a_switch(client, design_url):
    page = client.get(design_url)
    assert page.status_code == 200
    for line in DIRECTIONS + DISTANCES:
        assert f'name="on" value="{line}"' in page.text
    assert "/static/design.js" in page.text and CAUTION in page.text
    assert "<script>" not in page.text  # no inline script: the CSP forbids it


def test_design_json_equals_the_design_without_the_lines(client, design_url):
    answer = client.get(design_url + ".json?off=43,26")
    assert answer.status_code == 200
    expected = design_figures(
        plan_fieldbook(BOOK.read_bytes(), source="bridge.fieldbook", switched_off={43, 26})
    )
    assert answer.json() == expected
    assert answer.json()["observations"]["43"]["note"] == "switched off"


def test_switching_off_what_holds_a_point_is_refused_with_its_name(client, design_url):
    # A2 left with the distance from A1 alone: a circle, not a point
    answer = client.get(design_url + ".json?off=31,41,47,48")
    assert answer.status_code == 422
    assert answer.json()["points"] == ["A2"]


def test_the_form_without_script_switches_off_the_unchecked_lines(client, design_url):
    kept = [line for line in DIRECTIONS + DISTANCES if line != 45]
    page = client.get(design_url, params=[("form", "1")] + [("on", str(x)) for x in kept])
    assert page.status_code == 200
    assert 'value="45" aria-label="use line 45">' in page.text  # unchecked
    assert 'value="44" aria-label="use line 44" checked>' in page.text
    assert "off=45" in page.text  # the report links follow the choice


def test_the_design_reports_carry_the_caution(client, design_url):
    html = client.get(design_url + ".html?off=45")
    assert html.status_code == 200 and CAUTION in html.text
    assert "style-src 'sha256-" in html.headers["content-security-policy"]
    assert "network design" in html.text
    pdf = client.get(design_url + ".pdf")
    assert pdf.status_code == 200 and pdf.content.startswith(b"%PDF")


def test_the_project_list_still_lists_a_design(client, design_url):
    assert client.get("/projects").status_code == 200
