"""Limits on the work one field book may ask for: observations and unknowns.

A book just above a limit is refused before the adjustment, with a message that
names the limit and the count; the command line has no limit unless asked.
"""

from __future__ import annotations

import subprocess
import sys
import warnings
from pathlib import Path

import pytest

from server.errors import FieldbookError, NetworkError
from server.pipeline import adjust_fieldbook
from server.settings import DEFAULT_MAX_OBSERVATIONS, DEFAULT_MAX_UNKNOWNS, WorkLimits
from server.web import create_app

with warnings.catch_warnings():
    # starlette's test client prefers httpx2 and warns when it finds only httpx
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

ROOT = Path(__file__).resolve().parent.parent
HEADER_LINES = 4  # the observation lines start after these


def level_chain(sections: int) -> str:
    """A levelled line from a fixed benchmark: ``sections`` observations, as many unknown
    heights."""
    lines = [
        "fieldbook 1",
        'title "Limit test line"',
        "defaults level=1.0mm/sqrtkm",
        "point BM0 height=10.0000 fix",
    ]
    lines += [
        f"level {'BM0' if i == 0 else f'P{i}'} P{i + 1} +0.1000 len=0.100km"
        for i in range(sections)
    ]
    return "\n".join(lines) + "\n"


def test_a_book_one_observation_over_the_limit_is_refused_at_that_observation():
    with pytest.raises(FieldbookError) as caught:
        adjust_fieldbook(level_chain(11), limits=WorkLimits(max_observations=10))
    (issue,) = caught.value.issues
    assert issue.line == HEADER_LINES + 11  # the eleventh observation, the first over the limit
    assert "11 observations" in issue.message and "10 this service" in issue.message


def test_a_book_at_the_limit_adjusts():
    result = adjust_fieldbook(
        level_chain(10), limits=WorkLimits(max_observations=10, max_unknowns=10)
    )
    assert len(result.points) == 11
    assert result.points[-1].height == pytest.approx(11.0, abs=1e-9)  # ten rises of 0.1 m


def test_a_network_with_too_many_unknowns_is_refused_naming_both_numbers():
    with pytest.raises(NetworkError) as caught:
        adjust_fieldbook(level_chain(5), limits=WorkLimits(max_unknowns=4))
    assert "5 unknowns" in caught.value.message and "4 this service" in caught.value.message


def test_the_service_defaults_are_the_documented_ones(tmp_path, monkeypatch):
    monkeypatch.delenv("STATIONFIT_MAX_OBSERVATIONS", raising=False)
    monkeypatch.delenv("STATIONFIT_MAX_UNKNOWNS", raising=False)
    app = create_app(tmp_path)
    assert app.state.limits == WorkLimits(DEFAULT_MAX_OBSERVATIONS, DEFAULT_MAX_UNKNOWNS)
    assert (DEFAULT_MAX_OBSERVATIONS, DEFAULT_MAX_UNKNOWNS) == (200_000, 100_000)
    docs = (ROOT / "docs" / "security.md").read_text(encoding="utf-8")
    assert "200,000 observations" in docs and "100,000 unknowns" in docs


@pytest.fixture
def limited(tmp_path, monkeypatch):
    monkeypatch.setenv("STATIONFIT_MAX_OBSERVATIONS", "10")
    monkeypatch.setenv("STATIONFIT_MAX_UNKNOWNS", "8")
    with TestClient(create_app(tmp_path)) as client:
        yield client


def upload(book: str) -> dict:
    return {"files": {"fieldbook": ("line.fieldbook", book.encode(), "text/plain")}}


def test_api_adjust_answers_422_naming_the_observation_limit(limited):
    response = limited.post("/api/adjust", **upload(level_chain(11)))
    assert response.status_code == 422
    body = response.json()
    assert "11 observations" in body["error"] + str(body.get("errors"))
    assert body["errors"][0]["line"] == HEADER_LINES + 11


def test_api_adjust_answers_422_naming_the_unknown_limit(limited):
    response = limited.post("/api/adjust", **upload(level_chain(9)))
    assert response.status_code == 422
    assert "9 unknowns" in response.json()["error"]
    assert limited.post("/api/adjust", **upload(level_chain(8))).status_code == 200


def test_an_api_project_over_the_limit_is_refused_and_not_stored(limited):
    response = limited.post("/api/projects", **upload(level_chain(11)))
    assert response.status_code == 422
    assert limited.get("/api/projects").json()["projects"] == []


def test_a_browser_upload_over_the_limit_gets_an_error_page(limited):
    response = limited.post("/projects", **upload(level_chain(11)))
    assert response.status_code == 422
    assert "text/html" in response.headers["content-type"]
    assert "11 observations" in response.text and "10 this service" in response.text
    assert limited.get("/api/projects").json()["projects"] == []


def run_cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "server", *args],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


def test_the_command_line_has_no_limit_unless_asked(tmp_path):
    book = tmp_path / "line.fieldbook"
    book.write_text(level_chain(12), encoding="utf-8")
    assert run_cli("adjust", str(book), "--json").returncode == 0
    over_observations = run_cli("adjust", str(book), "--max-observations", "11")
    assert over_observations.returncode == 2
    assert "12 observations" in over_observations.stderr
    assert "Traceback" not in over_observations.stderr
    over_unknowns = run_cli("adjust", str(book), "--max-unknowns", "11")
    assert over_unknowns.returncode == 3
    assert "12 unknowns" in over_unknowns.stderr
