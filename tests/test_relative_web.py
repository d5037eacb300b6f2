"""Picking point pairs on the results page: queued as a decision, written by the re-run.

The invented boundary survey of ``tests/test_relative_pairs.py`` (two held
control marks, four lot corners, no observation between corners) is uploaded
through the pages; the picked pairs must come back as requested relative
ellipses and as ``relative`` lines in the edited field book.
"""

from __future__ import annotations

import html as html_module
import re
import warnings
from pathlib import Path

import pytest
from fastapi import FastAPI

from server.web import create_app
from server.web.relative import PairRequestError, requested_pairs
from tests.test_relative_pairs import boundary_text

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

TEXT = boundary_text()


@pytest.fixture
def client(tmp_path: Path) -> TestClient:
    app: FastAPI = create_app(tmp_path / "data")
    with TestClient(app) as c:
        yield c


def _upload(client: TestClient, text: str = TEXT, name: str = "lot14.fieldbook") -> str:
    response = client.post(
        "/projects",
        files={"fieldbook": (name, text.encode(), "text/plain")},
        follow_redirects=False,
    )
    assert response.status_code == 303
    return response.headers["location"].rsplit("/", 1)[1]


def _token(html: str) -> str:
    match = re.search(r'name="token" value="([0-9a-f]{32})"', html)
    assert match, "no form token on the page"
    return match.group(1)


def _picker(html: str) -> str:
    match = re.search(r'<section class="panel relative-picker".*?</section>', html, re.DOTALL)
    assert match, "no pair picker on the results page"
    return match.group(0)


def _ask(client: TestClient, project: str, **fields):
    token = _token(client.get(f"/projects/{project}").text)
    data = {"token": token, "reason": "client asks 2 cm + 50 ppm between corners", **fields}
    return client.post(f"/projects/{project}/relative-pairs", data=data, follow_redirects=False)


def _rerun(client: TestClient, project: str):
    token = _token(client.get(f"/projects/{project}/review").text)
    return client.post(f"/projects/{project}/runs", data={"token": token}, follow_redirects=False)


def test_results_page_offers_the_adjusted_points_but_not_loose_ones(client):
    project = _upload(client, TEXT + "point FAR east=1.0 north=2.0\n")
    picker = _picker(client.get(f"/projects/{project}").text)
    for name in ("CM-7", "CM-9", "K1", "K4"):
        assert f'<option value="{name}">' in picker
    assert "FAR" not in picker  # no used observation ties it to the survey
    assert 'name="token"' in picker and 'name="among" multiple' in picker


def test_picked_pairs_are_queued_and_the_rerun_reports_them(client):
    project = _upload(client)
    response = _ask(
        client, project, **{"from": "K1", "to": "K2"}, among=["K2", "K3", "K4"], pair=["K4 K1"]
    )
    assert response.status_code == 303
    assert response.headers["location"].endswith("/review#decisions")
    review = client.get(f"/projects/{project}/review").text
    assert "Report the relative precision of 5 pairs" in review
    assert "K4–K1, K1–K2, K2–K3, K2–K4, K3–K4" in html_module.unescape(review)
    assert _rerun(client, project).status_code == 303
    data = client.get(f"/projects/{project}/result.json").json()
    requested = {(r["from"], r["to"]) for r in data["relative"] if r["requested"]}
    assert requested == {("K1", "K2"), ("K4", "K1"), ("K2", "K3"), ("K2", "K4"), ("K3", "K4")}
    edited = client.get(f"/projects/{project}/fieldbook/edited").text
    added = [line for line in edited.splitlines() if line.startswith("relative ")]
    assert added[0].startswith("relative K4 K1  # ")
    assert "relative precision asked for: client asks 2 cm + 50 ppm between corners" in added[0]
    assert len(added) == 5
    # the original lines keep their numbers
    assert edited.splitlines()[: TEXT.count("\n")] == TEXT.splitlines()
    page = html_module.unescape(client.get(f"/projects/{project}").text)
    assert "8 joined pairs and 5 requested pairs" in page


def test_a_form_without_the_token_is_refused(client):
    project = _upload(client)
    response = client.post(
        f"/projects/{project}/relative-pairs",
        data={"from": "K1", "to": "K2", "reason": "x"},
        follow_redirects=False,
    )
    assert response.status_code == 403
    assert (
        client.get(f"/projects/{project}/review").text.count("Report the relative precision") == 0
    )


@pytest.mark.parametrize(
    ("fields", "words"),
    [
        ({"from": "K1", "to": "K1"}, "names the same point twice"),
        ({"from": "K1"}, "choose both points of the pair"),
        ({"from": "K1", "to": "<script>alert(1)</script>"}, "is not among the adjusted points"),
        ({"among": ["K1"]}, "at least two points"),
        ({}, "choose a pair"),
        ({"from": "K1", "to": "K2", "reason": "   "}, "give a reason"),
    ],
)
def test_bad_picks_are_refused_with_a_sentence_and_escaped(client, fields, words):
    project = _upload(client)
    response = _ask(client, project, **fields)
    assert response.status_code == 422
    assert words in response.text.lower() or words in response.text
    assert "<script>alert(1)</script>" not in response.text
    assert f'href="/projects/{project}#relative-picker"' in response.text


def test_counts_are_bounded():
    names = [f"P{k}" for k in range(30)]
    with pytest.raises(PairRequestError, match="at most 20"):
        requested_pairs(names, [], "", "", names[:21])
    assert len(requested_pairs(names, [], "", "", names[:20])) == 190
    many = [f"P0 P{k}" for k in range(1, 30)] + [f"P1 P{k}" for k in range(2, 30)]
    many += [f"P2 P{k}" for k in range(3, 30)] + [f"P3 P{k}" for k in range(4, 30)]
    many += [f"P4 P{k}" for k in range(5, 30)] + [f"P5 P{k}" for k in range(6, 30)]
    many += [f"P6 P{k}" for k in range(7, 30)] + [f"P7 P{k}" for k in range(8, 30)]
    assert len(many) > 200
    with pytest.raises(PairRequestError, match="at most 200"):
        requested_pairs(names, many, "", "", [])
    # the same pair written both ways counts once
    assert requested_pairs(names, ["P1 P2", "P2 P1"], "P1", "P2", []) == [("P1", "P2")]


def test_a_leveling_project_gets_the_sd_of_the_height_difference(client):
    text = (
        "defaults level=1.0mm/sqrtkm\n"
        "point BM-A height=50.0000 fix\npoint BM-B height=52.0000 fix\n"
        "level BM-A N1 +0.8123 len=0.8km\nlevel N1 BM-B +1.1890 len=0.6km\n"
        "level BM-A N2 +1.4002 len=1.1km\nlevel N2 BM-B +0.5985 len=0.9km\n"
    )
    project = _upload(client, text, "heights.fieldbook")
    picker = _picker(client.get(f"/projects/{project}").text)
    assert "standard deviation of its height difference" in picker
    assert _ask(client, project, **{"from": "N1", "to": "N2"}).status_code == 303
    assert _rerun(client, project).status_code == 303
    data = client.get(f"/projects/{project}/result.json").json()
    (pair,) = data["relative_heights"]
    assert (pair["from"], pair["to"]) == ("N1", "N2")
    # N1 and N2 lie on separate lines between the benchmarks: uncorrelated, so
    # σ(ΔH)² = σ(N1)² + σ(N2)²
    points = {p["name"]: p for p in data["points"]}
    assert pair["sd"] == pytest.approx(
        (points["N1"]["sd_height"] ** 2 + points["N2"]["sd_height"] ** 2) ** 0.5, rel=1e-9
    )
    page = client.get(f"/projects/{project}").text
    assert 'id="relative-heights"' in page
