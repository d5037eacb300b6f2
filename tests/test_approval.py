"""Approval for issue: the surveyor in responsible charge approves a run, the run is frozen,
a change makes a new run that needs its own approval, and the approved run's reports (HTML,
PDF, text) say who approved which run of which field book, with the caution kept."""

from __future__ import annotations

import io
import re
import sqlite3
import warnings

import pypdf
import pytest

from server.results.result import CAUTION
from server.store.backends import integrity_errors
from server.store.sqlite import NotApprovable
from server.web import create_app
from tests.postgres import app_on
from tests.test_review import TWO_BLUNDERS, leveling_with_blunders

with warnings.catch_warnings():  # starlette's notice about httpx, as tests/test_web.py
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

PASSWORD = "three words of moss"
BOOK = leveling_with_blunders(TWO_BLUNDERS)
LINE = next(k for k, text in enumerate(BOOK.splitlines(), 1) if text.startswith("level M2 M4"))
SENTENCE = re.compile(
    r"Approved for issue by sam on (\d{4}-\d{2}-\d{2}), run #(\d+), "
    r"field book SHA-256 ([0-9a-f]{64})\. A record of review, not a certification\."
)


@pytest.fixture
def office(tmp_path, store_location):
    """A surveyor and a technician on either back end (``store_location``)."""
    app = app_on(store_location, tmp_path)
    app.state.accounts.add("sam", "surveyor", PASSWORD)
    app.state.accounts.add("tom", "technician", PASSWORD)
    clients = {}
    for name in ("sam", "tom"):
        client = TestClient(app, base_url="http://127.0.0.1:8000")
        signed = client.post(
            "/sign-in", data={"name": name, "password": PASSWORD}, follow_redirects=False
        )
        assert signed.status_code == 303
        clients[name] = client
    created = clients["tom"].post(
        "/api/projects", files={"fieldbook": ("net.fieldbook", BOOK.encode())}
    )
    project = created.json()["id"]
    token = app.state.store.get_project(project).form_token
    shared = clients["tom"].post(
        f"/projects/{project}/sharing",
        data={"token": token, "office": "", "users": "sam"},
        follow_redirects=False,
    )
    assert shared.status_code == 303
    return app, clients, project, token


def _raw_update(store, statement: str, run_id: int) -> None:
    """One statement on a connection of its own, around the store (either back end)."""
    if store.path is None:
        import psycopg

        with psycopg.connect(store.backend.url) as raw:
            raw.execute(statement.replace("?", "%s"), (run_id,))
        return
    with sqlite3.connect(store.path) as raw:
        raw.execute(statement, (run_id,))


def _approve(client, project, run_id, token):
    return client.post(
        f"/projects/{project}/runs/{run_id}/approve",
        data={"token": token},
        follow_redirects=False,
    )


def _pdf_text(data: bytes) -> str:
    return "\n".join(page.extract_text() for page in pypdf.PdfReader(io.BytesIO(data)).pages)


def test_an_approved_run_is_frozen_and_a_change_makes_a_new_run(office):
    app, clients, project, token = office
    store = app.state.store
    sam, tom = clients["sam"], clients["tom"]
    (first,) = store.runs(project)

    # the technician proposes and re-runs; the technician may not approve
    decision = {"token": token, "line": str(LINE), "action": "exclude", "reason": "misread"}
    assert tom.post(f"/projects/{project}/edits", data=decision).status_code == 200
    assert _approve(sam, project, first.id, token).status_code == 409  # a decision is queued
    assert tom.post(f"/projects/{project}/runs", data={"token": token}).status_code == 200
    second = store.runs(project)[-1]
    assert second.number == 2 and second.finished and second.started_by == "tom"
    assert _approve(tom, project, second.id, token).status_code == 403
    assert _approve(sam, project, first.id, token).status_code == 409  # not the latest

    # the surveyor approves run #2
    review = sam.get(f"/projects/{project}/review").text
    assert "Approve run #2 for issue" in review
    assert _approve(sam, project, second.id, token).status_code == 303
    (approval,) = store.approvals(project).values()
    assert (approval.approved_by, approval.run_number) == ("sam", 2)
    assert approval.fieldbook_sha256 == store.run(project, second.id).result().text_sha256
    assert _approve(sam, project, second.id, token).status_code == 409  # only once
    with pytest.raises(NotApprovable, match="already approved"):
        store.approve_run(project, second.id, app.state.accounts.named("sam").actor)
    review = sam.get(f"/projects/{project}/review").text
    assert "Run #2 is frozen" in review and "Approve run #2" not in review
    assert "approved for issue run #2" in review  # the review trail

    # frozen in the database: the approved run and its approval are never updated
    for statement in (
        "UPDATE runs SET status = 'failed' WHERE id = ?",
        "UPDATE runs SET settings = '{}' WHERE id = ?",
        "UPDATE approvals SET approved_by = 'someone else' WHERE run_id = ?",
    ):
        with pytest.raises(integrity_errors(), match=r"frozen|never changed"):
            _raw_update(store, statement, second.id)
    assert store.run(project, second.id).settings == second.settings

    # a later decision makes run #3, which is not approved; run #2 stays approved
    later = {**decision, "line": str(LINE + 1), "reason": "second look"}
    assert tom.post(f"/projects/{project}/edits", data=later).status_code == 200
    assert tom.post(f"/projects/{project}/runs", data={"token": token}).status_code == 200
    third = store.runs(project)[-1]
    assert third.number == 3 and third.finished
    assert set(store.approvals(project)) == {second.id}
    review = sam.get(f"/projects/{project}/review").text
    assert "Run #3 is not approved for issue" in review and "Run #2 was approved by sam" in review
    assert "Approve run #3 for issue" in review
    assert "Approved for issue" not in sam.get(f"/projects/{project}/report.txt").text
    # the approved run's own reports stay at hand, and say so; run #3's say nothing of it
    kept = tom.get(f"/projects/{project}/runs/{second.id}/report.txt")
    assert kept.status_code == 200 and "run2-report.txt" in kept.headers["content-disposition"]
    assert SENTENCE.search(kept.text).group(2) == "2"
    assert "Approved" not in tom.get(f"/projects/{project}/runs/{third.id}/report.txt").text
    assert SENTENCE.search(
        " ".join(
            _pdf_text(tom.get(f"/projects/{project}/runs/{second.id}/report.pdf").content).split()
        )
    )

    runs = sam.get(f"/api/projects/{project}").json()["runs"]
    assert [(r["number"], r["started_by"]) for r in runs] == [(1, "tom"), (2, "tom"), (3, "tom")]
    assert [r["approval"] and r["approval"]["approved_by"] for r in runs] == [None, "sam", None]
    trail = [(t.actor, t.event, t.detail) for t in store.trail(project)]
    assert trail[0][:2] == ("tom", "created")
    assert ("tom", "run", "run #2 with 1 decision in force") in trail
    assert ("sam", "approved", "run #2") in trail
    assert ("tom", "run", "run #3 with 2 decisions in force") in trail


def test_the_reports_of_an_approved_run_say_who_approved_which_run_of_which_book(office):
    app, clients, project, token = office
    sam = clients["sam"]
    (run,) = app.state.store.runs(project)
    before = sam.get(f"/projects/{project}/report.txt").text
    assert "Approved for issue" not in before
    assert _approve(sam, project, run.id, token).status_code == 303
    sha = app.state.store.run(project, run.id).result().text_sha256
    text = sam.get(f"/projects/{project}/report.txt").text
    html = sam.get(f"/projects/{project}/report.html").text
    pdf = _pdf_text(sam.get(f"/projects/{project}/report.pdf").content)
    for report in (text, html, " ".join(pdf.split())):
        found = SENTENCE.search(report)
        assert found is not None, report[:2000]
        assert found.group(2) == "1" and found.group(3) == sha
        assert found.group(1) == app.state.store.approvals(project)[run.id].approved[:10]
    # the caution stays: on the HTML report, and on every page of the PDF
    assert CAUTION in " ".join(html.split()) and CAUTION in text
    pages = pypdf.PdfReader(io.BytesIO(sam.get(f"/projects/{project}/report.pdf").content)).pages
    words = [" ".join(page.extract_text().split()) for page in pages]
    assert all("licensed professional surveyor" in text for text in words)
    # a report with presets chosen afterwards is another evaluation: no approval on it
    presets = sam.get(f"/projects/{project}/report.txt?relative=alta-nsps-2026").text
    assert "Approved for issue" not in presets
    # the project page shows it to every account that sees the project
    assert SENTENCE.search(clients["tom"].get(f"/projects/{project}").text) is not None


def test_approval_needs_accounts(tmp_path):
    app = create_app(tmp_path)
    with TestClient(app) as client:
        created = client.post("/api/projects", files={"fieldbook": ("n.fieldbook", BOOK.encode())})
        project = created.json()["id"]
        (run,) = app.state.store.runs(project)
        token = app.state.store.get_project(project).form_token
        refused = _approve(client, project, run.id, token)
        assert refused.status_code == 403 and "needs accounts" in refused.text
        assert "Approval for issue" not in client.get(f"/projects/{project}/review").text
