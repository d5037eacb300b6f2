"""The monitoring page (server/web/monitoring.py): stored projects chosen as epochs."""

from __future__ import annotations

import re
import warnings
from pathlib import Path

import pytest

from server.results.types import CAUTION
from server.web.app import create_app

with warnings.catch_warnings():
    # starlette's test client prefers httpx2 and warns when it finds only httpx
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

DEMO = sorted(
    (Path(__file__).resolve().parent.parent / "demo_projects" / "monitoring").glob("*.fieldbook")
)


@pytest.fixture
def client(tmp_path):
    with TestClient(create_app(tmp_path / "data")) as c:
        yield c


def _store(client: TestClient, path: Path) -> str:
    response = client.post(
        "/projects",
        files={"fieldbook": (path.name, path.read_bytes(), "text/plain")},
        follow_redirects=False,
    )
    assert response.status_code == 303, response.text
    return response.headers["location"].rsplit("/", 1)[1]


def test_the_page_lists_projects_and_compares_the_chosen_ones(client):
    ids = [_store(client, path) for path in (DEMO[0], DEMO[3], DEMO[5], DEMO[-1])]
    chooser = client.get("/monitoring")
    assert chooser.status_code == 200
    assert all(f'value="{i}"' in chooser.text for i in ids)
    query = "&".join(f"project={i}" for i in ids) + "&period=365.25&threshold=3mm"
    page = client.get(f"/monitoring?{query}")
    assert page.status_code == 200, page.text
    html = page.text
    assert "Epoch 0 against epoch 3" in html
    assert re.search(r"Moved: <strong>[^<]*W-3", html)
    assert html.count("<svg") >= 3
    assert not re.search(r"<script(?![^>]*\bsrc=)", html)  # no inline script (CSP)
    assert " style=" not in html  # no inline style either
    assert "<ellipse" not in html  # leveling: bars with intervals, no ellipses
    assert "Time series" in html and "Alarm" in html
    # one time-series figure per mark, each with a value and a residual stem per epoch
    assert html.count('class="series-svg"') == html.count('class="series-figure"') >= 5
    first = html[html.index('class="series-svg"') :]
    first = first[: first.index("</svg>")]
    assert first.count('class="series-value"') == first.count('class="series-residual"') == 4
    assert CAUTION in html
    assert "script-src 'self'" in page.headers["content-security-policy"]


def test_one_project_or_an_unknown_one_is_refused_with_a_sentence(client):
    one = _store(client, DEMO[0])
    response = client.get(f"/monitoring?project={one}")
    assert response.status_code == 422 and "choose from 2" in response.text
    response = client.get(f"/monitoring?project={one}&project=nosuch")
    assert response.status_code == 422 and "no project" in response.text


def test_bad_options_are_refused_with_a_sentence(client):
    a, b = _store(client, DEMO[0]), _store(client, DEMO[1])
    response = client.get(f"/monitoring?project={a}&project={b}&confidence=2")
    assert response.status_code == 422 and "confidence" in response.text


def test_the_service_limits_apply_to_the_epochs(tmp_path):
    from server.settings import WorkLimits

    app = create_app(tmp_path / "data", limits=WorkLimits(max_observations=20))
    with TestClient(app) as client:
        a, b = _store(client, DEMO[0]), _store(client, DEMO[1])
        response = client.get(f"/monitoring?project={a}&project={b}")
        assert response.status_code == 200, response.text
        small = WorkLimits(max_observations=5)
        app.state.limits = small
        response = client.get(f"/monitoring?project={a}&project={b}")
        assert response.status_code == 422 and "observations" in response.text
