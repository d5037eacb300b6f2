"""Another site's page cannot make a surveyor's browser store or adjust anything (issue 12, item 2).

A page elsewhere can submit a form or call ``fetch`` towards ``http://127.0.0.1:8000``;
the browser then sends ``Origin`` and ``Sec-Fetch-Site`` naming that page's site.  Every
POST, PUT, PATCH and DELETE so marked is refused with 403 before its body is read, and
nothing is stored.  Requests from the service's own pages, and scripts that send no
browser headers at all, work as before.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator
from pathlib import Path

import pytest

from server.web import create_app
from server.web.app import SECURITY_HEADERS

with warnings.catch_warnings():
    # starlette's test client prefers httpx2 and warns when it finds only httpx
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

REPO = Path(__file__).resolve().parents[1]
BLUNDER = (REPO / "demo_projects" / "leveling_blunder.fieldbook").read_bytes()
OWN = "http://127.0.0.1:8000"

#: Headers a browser sends when a page of another origin posts to the service.
FOREIGN = {
    "another site": {"Origin": "https://evil.example", "Sec-Fetch-Site": "cross-site"},
    "another site, Origin only": {"Origin": "https://evil.example"},
    "another site, Sec-Fetch-Site only": {"Sec-Fetch-Site": "cross-site"},
    "another port of the same host": {
        "Origin": "http://127.0.0.1:9999",
        "Sec-Fetch-Site": "same-site",
    },
    "a sub-domain (same-site)": {"Sec-Fetch-Site": "same-site"},
    "a sandboxed frame or file (Origin: null)": {"Origin": "null"},
    "another site that calls itself the own": {
        "Origin": "https://evil.example",
        "Sec-Fetch-Site": "same-origin",
    },
    "a look-alike host": {"Origin": "http://127.0.0.1:8000.evil.example"},
}


def _upload(client: TestClient, route: str, headers: dict[str, str]):
    """POST a field book to one of the routes that store or adjust one."""
    if route.startswith("/demos/"):
        return client.post(route, headers=headers, follow_redirects=False)
    return client.post(
        route,
        headers=headers,
        follow_redirects=False,
        files={"fieldbook": ("b.fieldbook", BLUNDER, "text/plain")},
    )


UPLOAD_ROUTES = ("/projects", "/demos/leveling_blunder", "/api/projects", "/api/adjust")


@pytest.fixture
def client(tmp_path: Path) -> Iterator[TestClient]:
    with TestClient(create_app(tmp_path / "data"), base_url=OWN) as c:
        yield c


@pytest.mark.parametrize("route", UPLOAD_ROUTES)
@pytest.mark.parametrize("where", list(FOREIGN))
def test_uploads_from_another_site_are_refused_and_nothing_is_stored(client, route, where):
    response = _upload(client, route, FOREIGN[where])
    assert response.status_code == 403, (route, where, response.status_code)
    assert "another site" in response.text and "nothing was stored" in response.text
    for key in SECURITY_HEADERS:
        assert key in response.headers, key
    if route.startswith("/api/"):
        assert "another site" in response.json()["error"]
    else:
        assert response.headers["content-type"].startswith("text/html")
    assert client.get("/api/projects").json()["projects"] == []


@pytest.mark.parametrize("route", UPLOAD_ROUTES)
def test_uploads_from_the_own_page_and_from_scripts_still_work(client, route):
    own_page = {"Origin": OWN, "Sec-Fetch-Site": "same-origin"}
    # Chromium sends Origin: null for a page's own form under Referrer-Policy: no-referrer
    own_form = {"Origin": "null", "Sec-Fetch-Site": "same-origin"}
    for headers in (own_page, own_form, {"Origin": OWN}, {"Sec-Fetch-Site": "none"}, {}):
        response = _upload(client, route, headers)
        assert response.status_code in (200, 201, 303), (route, headers, response.status_code)
    if route == "/api/adjust":
        assert response.json()["summary"]["observations"] > 0
        assert client.get("/api/projects").json()["projects"] == []  # adjusts without storing
    else:
        assert len(client.get("/api/projects").json()["projects"]) == 5


def test_the_own_origin_is_matched_with_its_port_and_case(tmp_path):
    """``https://host`` is ``host:443``; a Host without a port matches the default port."""
    with TestClient(create_app(tmp_path / "d"), base_url="https://Survey.Office.example") as c:
        ok = _upload(c, "/api/projects", {"Origin": "https://survey.office.example"})
        assert ok.status_code == 201
        ok = _upload(c, "/api/projects", {"Origin": "https://survey.office.example:443"})
        assert ok.status_code == 201
        other_port = _upload(c, "/api/projects", {"Origin": "https://survey.office.example:8443"})
        assert other_port.status_code == 403
        assert len(c.get("/api/projects").json()["projects"]) == 2


def test_review_forms_and_deletion_from_another_site_are_refused(client):
    """The token forms keep their token and are refused from another site even with it."""
    project = _upload(client, "/api/projects", {}).json()["id"]
    foreign = FOREIGN["another site"]
    for path, data in (
        (f"/projects/{project}/edits", {"line": "5", "action": "exclude"}),
        (f"/projects/{project}/runs", {}),
        (f"/projects/{project}/delete", {}),
        (f"/projects/{project}/relative-pairs", {}),
    ):
        response = client.post(path, data=data, headers=foreign, follow_redirects=False)
        assert response.status_code == 403, (path, response.status_code)
    for method in ("PUT", "PATCH", "DELETE"):  # refused before any route is looked up
        response = client.request(method, f"/api/projects/{project}", headers=foreign)
        assert response.status_code == 403, method
    assert [p["id"] for p in client.get("/api/projects").json()["projects"]] == [project]
    review = client.get(f"/projects/{project}/review").text
    assert "Queued: " not in review  # the decision was not queued
    assert client.app.state.store.pending_edits(project) == []
    assert len(client.app.state.store.runs(project)) == 1  # no re-run was started


def test_reading_from_another_site_is_not_refused(client):
    """Only requests that change something are checked; links from elsewhere still open."""
    response = client.get("/", headers=FOREIGN["another site"])
    assert response.status_code == 200
