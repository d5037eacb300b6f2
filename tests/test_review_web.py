"""The review workflow in the web service: decide, re-run, compare, download, delete.

A ten-mark leveling network with two injected blunders (+15 mm on M2→M4 and
−12 mm on M6→M7, ``tests/test_review.py``) is uploaded through the pages;
every test checks what a surveyor would check on the screen or in the file.
"""

from __future__ import annotations

import logging
import re
import sqlite3
import warnings
from contextlib import closing
from html import unescape
from pathlib import Path

import pytest
from fastapi import FastAPI

from server.store.sqlite import Store
from server.web import create_app
from server.web.app import DATABASE_NAME
from tests.test_review import TWO_BLUNDERS, leveling_with_blunders

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2
    from fastapi.testclient import TestClient

TEXT = leveling_with_blunders(TWO_BLUNDERS)
FIRST = next(k for k, line in enumerate(TEXT.splitlines(), 1) if line.startswith("level M2 M4"))
SECOND = next(k for k, line in enumerate(TEXT.splitlines(), 1) if line.startswith("level M6 M7"))


@pytest.fixture
def app(tmp_path: Path) -> FastAPI:
    return create_app(tmp_path / "data")


@pytest.fixture
def client(app: FastAPI) -> TestClient:
    with TestClient(app) as c:
        yield c


@pytest.fixture
def project(client: TestClient) -> str:
    """The two-blunder network uploaded through the upload form; its project id."""
    response = client.post(
        "/projects",
        files={"fieldbook": ("two-blunders.fieldbook", TEXT.encode(), "text/plain")},
        follow_redirects=False,
    )
    assert response.status_code == 303
    return response.headers["location"].rsplit("/", 1)[1]


def _token(html: str) -> str:
    match = re.search(r'name="token" value="([0-9a-f]{32})"', html)
    assert match, "no form token on the page"
    return match.group(1)


def _observation_block(html: str, line: int) -> str:
    match = re.search(rf'<tbody id="line-{line}".*?</tbody>', html, re.DOTALL)
    assert match, f"no observation block for line {line}"
    return match.group(0)


def _text(html: str) -> str:
    return re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", html))


def _decide(
    client: TestClient,
    project: str,
    line: int,
    action: str = "exclude",
    reason: str = "staff misread",
    **extra: str,
):
    token = _token(client.get(f"/projects/{project}/review").text)
    return client.post(
        f"/projects/{project}/edits",
        follow_redirects=False,
        data={"token": token, "line": str(line), "action": action, "reason": reason, **extra},
    )


def _rerun(client: TestClient, project: str):
    token = _token(client.get(f"/projects/{project}/review").text)
    return client.post(f"/projects/{project}/runs", data={"token": token}, follow_redirects=False)


def _api(client: TestClient, project: str) -> dict:
    response = client.get(f"/api/projects/{project}")
    assert response.status_code == 200
    return response.json()


# ---------------------------------------------------------------------------------------
# the review page


def test_results_page_links_to_the_review(client, project):
    html = client.get(f"/projects/{project}").text
    assert f'href="/projects/{project}/review"' in html
    assert "Review observations (7 flagged)" in html


def test_flagged_observations_come_first_by_abs_w_with_their_own_line(client, project):
    html = client.get(f"/projects/{project}/review").text
    order = [int(n) for n in re.findall(r'<tbody id="line-(\d+)"', html)]
    result = _api(client, project)["result"]
    flagged = sorted(
        (o for o in result["observations"] if o["flagged"]), key=lambda o: -abs(o["w"])
    )
    assert order[: len(flagged)] == [o["line"] for o in flagged]
    assert order[:2] == [FIRST, SECOND]  # the two injected blunders have the largest |w|
    rest = order[len(flagged) :]
    assert rest == sorted(rest) and len(order) == len(result["observations"])
    block = _text(_observation_block(html, FIRST))
    worst = next(o for o in result["observations"] if o["line"] == FIRST)
    assert TEXT.splitlines()[FIRST - 1].strip() in block  # its own field book line
    assert f"{worst['w']:.2f}" in block and f"{worst['mdb']:.4f}" in block
    assert f"{worst['redundancy']:.2f}" in block and f"{worst['residual']:.4f}" in block
    assert "Flagged" in block


def test_field_book_text_is_escaped_on_the_review_page(client):
    book = (
        "defaults level=1mm\npoint <b>A</b> height=10 fix\n"
        'level <b>A</b> B +1.0000 note="<script>x</script>"\n'
        "level B <b>A</b> -1.0020\nlevel <b>A</b> B +1.0010\n"
    )
    created = client.post("/api/projects", files={"fieldbook": ("x.fieldbook", book.encode())})
    html = client.get(f"/projects/{created.json()['id']}/review").text
    assert "<script>x</script>" not in html and "<b>A</b>" not in html
    assert "&lt;script&gt;x&lt;/script&gt;" in html


# ---------------------------------------------------------------------------------------
# decide, re-run, compare


def test_leaving_out_the_worst_and_rerunning_clears_its_flag_and_shows_the_shifts(client, project):
    queued = _decide(client, project, FIRST, reason="staff misread, re-measured")
    assert queued.status_code == 303
    review = client.get(f"/projects/{project}/review").text
    assert "Queued: leave out" in _observation_block(review, FIRST)

    rerun = _rerun(client, project)
    assert rerun.status_code == 303
    assert re.fullmatch(rf"/projects/{project}/compare\?a=\d+&b=\d+", rerun.headers["location"])
    body = _api(client, project)
    assert [r["status"] for r in body["runs"]] == ["finished", "finished"]
    assert body["runs"][1]["edits"] == [
        {
            "line": FIRST,
            "action": "exclude",
            "reason": "staff misread, re-measured",
            "date": body["runs"][1]["edits"][0]["date"],
        }
    ]
    before, after = (
        client.get(f"/api/projects/{project}/runs/{r['id']}").json()["result"] for r in body["runs"]
    )
    assert next(o for o in after["observations"] if o["line"] == FIRST)["ignored"]

    html = client.get(rerun.headers["location"]).text
    cleared = re.search(r'id="flags-cleared".*?</div>', html, re.DOTALL).group(0)
    assert f'data-line="{FIRST}"' in cleared and "left out" in cleared
    still = re.search(r'id="flags-still".*?</div>', html, re.DOTALL).group(0)
    assert f'data-line="{SECOND}"' in still  # the second blunder is still flagged
    vf_a = before["summary"]["variance_factor"]
    vf_b = after["summary"]["variance_factor"]
    assert vf_b < vf_a / 1.5
    assert f"{vf_a:.3f}" in html and f"{vf_b:.3f}" in html

    # shifts: B − A per mark in mm, largest first, equal to the adjusted heights' change
    shifts = re.search(r'id="shifts".*?</section>', html, re.DOTALL).group(0)
    rows = re.findall(
        r'<th scope="row" class="mark">([^<]+)</th><td class="num strong">'
        r"([+-]?[0-9.]+)</td>",
        shifts,
    )
    heights_a = {p["name"]: p["height"] for p in before["points"]}
    heights_b = {p["name"]: p["height"] for p in after["points"]}
    assert len(rows) == 9  # M0 is held fixed and not listed
    sizes = [abs(float(value)) for _, value in rows]
    assert sizes == sorted(sizes, reverse=True)
    for name, value in rows:
        assert float(value) == pytest.approx((heights_b[name] - heights_a[name]) * 1000, abs=0.051)
    assert sizes[0] > 1.0  # leaving out a 15 mm blunder moves its marks by millimetres


def test_edited_field_book_reuploaded_gives_the_result_of_the_rerun(client, project):
    _decide(client, project, FIRST, reason="staff misread")
    _rerun(client, project)
    rerun_result = _api(client, project)["result"]

    download = client.get(f"/projects/{project}/fieldbook/edited")
    assert download.status_code == 200
    assert download.headers["content-disposition"] == (
        'attachment; filename="two-blunders-edited.fieldbook"'
    )
    edited = download.text
    line = edited.splitlines()[FIRST - 1]
    assert line.split("#")[0].split()[-1] == "ignore"
    assert re.search(r"# \d{4}-\d{2}-\d{2} left out: staff misread$", line)
    assert len(edited.splitlines()) == len(TEXT.splitlines())
    # the upload itself stays as it was
    assert client.get(f"/projects/{project}/fieldbook").content == TEXT.encode()

    again = client.post(
        "/api/projects", files={"fieldbook": ("edited.fieldbook", download.content)}
    ).json()
    vf_again = again["result"]["summary"]["variance_factor"]
    assert vf_again == pytest.approx(rerun_result["summary"]["variance_factor"], rel=1e-12)
    for p, q in zip(again["result"]["points"], rerun_result["points"], strict=True):
        assert p["height"] == pytest.approx(q["height"], abs=1e-12)


def test_decisions_accumulate_across_runs_and_bring_back_restores_the_observation(client, project):
    _decide(client, project, FIRST)
    _rerun(client, project)
    _decide(client, project, SECOND, reason="rod not plumb")
    _rerun(client, project)
    edits = _api(client, project)["runs"][-1]["edits"]
    assert [(e["line"], e["action"]) for e in edits] == [(FIRST, "exclude"), (SECOND, "exclude")]
    assert _api(client, project)["result"]["summary"]["global_test"]["passed"]

    _decide(client, project, FIRST, action="include", reason="re-measured: booking error found")
    _rerun(client, project)
    result = _api(client, project)["result"]
    assert not next(o for o in result["observations"] if o["line"] == FIRST)["ignored"]
    assert next(o for o in result["observations"] if o["line"] == SECOND)["ignored"]
    edited = client.get(f"/projects/{project}/fieldbook/edited").text.splitlines()[FIRST - 1]
    assert " ignore" not in edited.split("#")[0]
    assert "left out: staff misread; " in edited and "brought back: re-measured" in edited


def test_changing_the_standard_deviation_is_written_and_used(client, project):
    assert (
        _decide(
            client, project, FIRST, action="sd", sd="20mm", reason="tall rod, suspect reading"
        ).status_code
        == 303
    )
    _rerun(client, project)
    observation = next(
        o for o in _api(client, project)["result"]["observations"] if o["line"] == FIRST
    )
    assert observation["sd"] == pytest.approx(0.020)
    assert not observation["flagged"]  # 15 mm is within the new 20 mm
    line = client.get(f"/projects/{project}/fieldbook/edited").text.splitlines()[FIRST - 1]
    assert "sd=20mm" in line and "sd set to 20mm: tall rod" in line


def test_undo_withdraws_a_queued_decision(client, project):
    _decide(client, project, FIRST)
    review = client.get(f"/projects/{project}/review").text
    undo = re.search(rf'action="(/projects/{project}/edits/\d+/undo)"', review).group(1)
    response = client.post(undo, data={"token": _token(review)}, follow_redirects=False)
    assert response.status_code == 303
    review = client.get(f"/projects/{project}/review").text
    assert "Queued: " not in review and f"/projects/{project}/runs" not in review
    assert _rerun(client, project).status_code == 303
    assert len(_api(client, project)["runs"]) == 1  # nothing to re-run


# ---------------------------------------------------------------------------------------
# refusals are shown beside the observation, never a 500


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        ({"reason": "   "}, "every decision needs a reason"),
        ({"action": "sd", "sd": "3"}, "needs a unit, e.g. 3mm"),
        ({"action": "sd", "sd": "2sec"}, "no longer reads"),
        ({"action": "include"}, "is already used in the adjustment"),
        ({"action": "drop"}, "choose leave out, bring back, change sd or correct the value"),
    ],
)
def test_invalid_decisions_are_refused_beside_the_observation(client, project, extra, message):
    response = _decide(client, project, FIRST, **extra)
    assert response.status_code == 422
    block = _observation_block(response.text, FIRST)
    assert "field-error" in block and message in _text(block).lower()
    assert '<details class="decide" open>' in block  # the form stays open with the error
    assert "Queued: " not in _text(client.get(f"/projects/{project}/review").text)


def test_a_line_without_an_observation_is_refused_not_a_500(client, project):
    response = _decide(client, project, 1)  # line 1 is the defaults statement
    assert response.status_code == 422
    assert "holds no observation" in response.text


def test_forms_without_the_project_token_or_from_another_site_are_refused(client, project):
    data = {"line": str(FIRST), "action": "exclude", "reason": "x"}
    assert client.post(f"/projects/{project}/edits", data=data).status_code == 403
    token = _token(client.get(f"/projects/{project}/review").text)
    forged = client.post(
        f"/projects/{project}/edits",
        data={**data, "token": token},
        headers={"Origin": "https://evil.example"},
    )
    assert forged.status_code == 403
    cross = client.post(
        f"/projects/{project}/edits",
        data={**data, "token": token},
        headers={"Sec-Fetch-Site": "cross-site"},
    )
    assert cross.status_code == 403
    other = client.post("/api/projects", files={"fieldbook": ("o.fieldbook", TEXT.encode())})
    other_token = _token(client.get(f"/projects/{other.json()['id']}/review").text)
    assert other_token != token
    wrong = client.post(f"/projects/{project}/edits", data={**data, "token": other_token})
    assert wrong.status_code == 403
    assert "Queued: " not in _text(client.get(f"/projects/{project}/review").text)


# ---------------------------------------------------------------------------------------
# second opinions


def test_snooping_suggestion_lists_both_blunders_and_accepting_queues_an_exclusion(client, project):
    page = client.get(f"/projects/{project}/review").text
    assert "Suggest a sequence" in page and 'id="step-1"' not in page  # only on request
    html = client.get(f"/projects/{project}/review?suggest=1").text
    steps = re.findall(
        r'<li class="step step-open" id="step-(\d+)">.*?line (\d+)</a>', html, re.DOTALL
    )
    assert [(int(s), int(line)) for s, line in steps] == [(1, FIRST), (2, SECOND)]
    assert "No observation is flagged any more" in html
    assert re.search(r'value="data snooping step 2: \|w\| = \d+\.\d\d"', html)
    assert len(_api(client, project)["runs"]) == 1  # suggesting changes nothing

    token = _token(html)
    accept = client.post(
        f"/projects/{project}/edits",
        follow_redirects=False,
        data={
            "token": token,
            "line": str(FIRST),
            "action": "exclude",
            "back": "suggest",
            "reason": "data snooping step 1: |w| = 12.16 (rod misread)",
        },
    )
    assert accept.status_code == 303
    assert accept.headers["location"] == f"/projects/{project}/review?suggest=1#snooping"
    html = client.get(f"/projects/{project}/review?suggest=1").text
    assert re.search(r'class="step step-queued" id="step-1"', html)
    assert re.search(r'class="step step-open" id="step-2"', html)


def test_rejecting_a_step_holds_back_the_steps_that_assumed_it(client, project):
    html = client.get(f"/projects/{project}/review?suggest=1&reject={FIRST}").text
    assert re.search(r'class="step step-rejected" id="step-1"', html)
    assert re.search(r'class="step step-blocked" id="step-2"', html)
    assert "Accept step 2" not in html


def test_robust_panel_names_huber_and_lists_both_blunders_as_suspects(client, project):
    html = client.get(f"/projects/{project}/review").text
    panel = re.search(r'id="second-opinion".*?</section>', html, re.DOTALL).group(0)
    assert "Huber's weight function" in panel and "k = 1.5" in panel
    assert "Annals of Mathematical Statistics" in panel
    summary = re.search(r"Suspects:.*?</p>", panel, re.DOTALL).group(0)
    assert {int(n) for n in re.findall(r"line (\d+)</a>", summary)} == {FIRST, SECOND}
    assert "Pope" in panel and re.search(r"\|τ\| &gt; \d+\.\d\d", panel)


# ---------------------------------------------------------------------------------------
# failed and interrupted runs


def test_a_rerun_that_cannot_adjust_keeps_the_decisions_queued_and_earlier_runs(client):
    # B and C hang on the benchmark by one section: without it they have no height datum
    book = (
        "defaults level=1mm\npoint A height=10 fix\nlevel A B +1.0000\nlevel B C +0.5000\n"
        "level C B -0.5010\nlevel B C +0.5020\n"
    )
    project = client.post(
        "/api/projects", files={"fieldbook": ("spur.fieldbook", book.encode())}
    ).json()["id"]
    assert _decide(client, project, 3, reason="wrong mark").status_code == 303
    assert _rerun(client, project).status_code == 303
    body = _api(client, project)
    assert [r["status"] for r in body["runs"]] == ["finished", "failed"]
    assert body["runs"][0]["summary"]["used_observations"] == 4
    review = client.get(f"/projects/{project}/review").text
    assert "could not be adjusted" in review and "no height datum" in review
    assert "Queued: leave out" in _observation_block(review, 3)  # still queued, can be undone
    assert 'class="verdict-label">Global test, run #' in review  # the earlier run is reviewed


def test_an_interrupted_run_stays_unfinished_and_the_earlier_run_is_reviewed(app, client, project):
    store: Store = app.state.store
    run_id = store.start_run(
        project,
        {"edits": [{"line": FIRST, "action": "exclude", "reason": "x", "date": "2026-01-02"}]},
    )
    # the process stops here; a restarted service finds the run still marked running
    restarted = Store(store.path)
    assert restarted.latest_run(project).id != run_id
    assert [r.status for r in restarted.runs(project)] == ["finished", "running"]
    html = client.get(f"/projects/{project}/review").text
    assert f"Run #{run_id}, started" in html and "did not finish" in html
    assert _api(client, project)["result"] is not None  # the earlier result is still served


def test_an_unexpected_engine_error_marks_the_run_failed_not_running(app, project, monkeypatch):
    from server.store import projects as review_routes

    def explode(*args, **kwargs):
        raise RuntimeError("engine bug")

    monkeypatch.setattr(review_routes, "adjust_fieldbook", explode)
    with TestClient(app, raise_server_exceptions=False) as client:
        _decide(client, project, FIRST)
        response = _rerun(client, project)
        assert response.status_code == 500 and "engine bug" not in response.text
        statuses = [r["status"] for r in _api(client, project)["runs"]]
        assert statuses == ["finished", "failed"]
        assert "Queued: leave out" in client.get(f"/projects/{project}/review").text


# ---------------------------------------------------------------------------------------
# compare, list, delete


def test_compare_defaults_to_previous_and_latest_and_refuses_unknown_runs(client, project):
    only = client.get(f"/projects/{project}/compare")
    assert only.status_code == 200 and "Only one run so far" in only.text
    _decide(client, project, FIRST)
    _rerun(client, project)
    _decide(client, project, SECOND, reason="second blunder")
    _rerun(client, project)
    runs = [r["id"] for r in _api(client, project)["runs"]]
    html = client.get(f"/projects/{project}/compare").text
    assert f"Run A · #{runs[1]}" in html and f"Run B · #{runs[2]}" in html
    assert "✓ Passes" in html  # both blunders out: the global test passes
    first_vs_last = client.get(f"/projects/{project}/compare?a={runs[0]}&b={runs[2]}").text
    cleared = re.search(r'id="flags-cleared".*?</div>', first_vs_last, re.DOTALL).group(0)
    assert f'data-line="{FIRST}"' in cleared and f'data-line="{SECOND}"' in cleared
    for bad in ("99999", "x", "-1", "../1"):
        assert client.get(f"/projects/{project}/compare?a={bad}&b={runs[2]}").status_code == 404


def test_project_list_shows_the_latest_verdict_after_a_rerun(client, project):
    _decide(client, project, FIRST)
    _rerun(client, project)
    _decide(client, project, SECOND)
    _rerun(client, project)
    html = client.get("/projects").text
    assert "two-blunders.fieldbook" in html and "✓ Passes" in html
    assert f'action="/projects/{project}/confirm-delete"' in html


def test_delete_asks_for_confirmation_then_removes_the_project(client, project, tmp_path):
    confirm = client.post(f"/projects/{project}/confirm-delete")
    assert confirm.status_code == 200
    assert "Delete “two-blunders.fieldbook”?" in confirm.text
    assert f'action="/projects/{project}/delete"' in confirm.text
    assert _api(client, project)["id"] == project  # asking deletes nothing

    refused = client.post(f"/projects/{project}/delete")  # no token: a forged form
    assert refused.status_code == 403
    assert _api(client, project)["id"] == project

    deleted = client.post(
        f"/projects/{project}/delete", data={"token": _token(confirm.text)}, follow_redirects=False
    )
    assert deleted.status_code == 303 and deleted.headers["location"] == "/projects"
    assert client.get(f"/api/projects/{project}").status_code == 404
    assert client.get(f"/projects/{project}/review").status_code == 404
    assert project not in client.get("/projects").text.split("Recently deleted")[0]
    # Kept for the retention time (30 days by default), not erased yet.
    store = Store(tmp_path / "data" / DATABASE_NAME)
    assert [p.id for p in store.deleted_projects()] == [project]


def _delete(client, project: str) -> None:
    confirm = client.post(f"/projects/{project}/confirm-delete").text
    answer = client.post(
        f"/projects/{project}/delete", data={"token": _token(confirm)}, follow_redirects=False
    )
    assert answer.status_code == 303


def test_a_deleted_project_is_listed_as_recently_deleted_and_restored_with_its_runs(
    client, project, caplog
):
    _decide(client, project, FIRST)
    _rerun(client, project)
    store = client.app.state.store
    runs_before = [(r.id, r.status, r.settings) for r in store.runs(project)]
    assert len(runs_before) == 2
    confirm = client.post(f"/projects/{project}/confirm-delete").text
    assert "Recently deleted" in confirm and "30 days" in confirm
    caplog.set_level(logging.INFO, logger="stationfit.web")
    _delete(client, project)
    assert client.get(f"/projects/{project}").status_code == 404
    page = client.get("/deleted-projects")
    assert page.status_code == 200
    assert "two-blunders.fieldbook" in page.text
    assert f'action="/deleted-projects/{project}/restore"' in page.text

    assert client.post(f"/deleted-projects/{project}/restore").status_code == 403  # no token
    restored = client.post(
        f"/deleted-projects/{project}/restore",
        data={"token": _token(page.text)},
        follow_redirects=False,
    )
    assert restored.status_code == 303 and restored.headers["location"] == f"/projects/{project}"
    assert _api(client, project)["id"] == project
    assert [(r.id, r.status, r.settings) for r in store.runs(project)] == runs_before
    rerun = client.get(f"/api/projects/{project}/runs/{runs_before[1][0]}")  # the re-run is back
    assert rerun.status_code == 200
    assert project not in client.get("/deleted-projects").text
    assert (
        client.post(
            f"/deleted-projects/{project}/restore", data={"token": _token(page.text)}
        ).status_code
        == 404
    )
    lines = [r.getMessage() for r in caplog.records if r.name == "stationfit.web"]
    assert any(
        f"project {project} ('two-blunders.fieldbook') deleted by testclient" in m for m in lines
    ), lines
    assert any(
        f"project {project} ('two-blunders.fieldbook') restored by testclient" in m for m in lines
    ), lines


def test_a_retention_of_0_days_erases_a_deleted_project_at_once(tmp_path, caplog):
    client = TestClient(create_app(tmp_path / "data", keep_deleted_days=0))
    project = (
        client.post(
            "/projects",
            files={"fieldbook": ("two-blunders.fieldbook", TEXT.encode(), "text/plain")},
            follow_redirects=False,
        )
        .headers["location"]
        .rsplit("/", 1)[1]
    )
    with caplog.at_level(logging.INFO, logger="stationfit.web"):
        _delete(client, project)
    store = Store(tmp_path / "data" / DATABASE_NAME)
    assert store.deleted_projects() == [] and store.runs(project) == []
    assert "two-blunders" not in client.get("/deleted-projects").text
    assert any(
        f"project {project} ('two-blunders.fieldbook') purged for good" in r.getMessage()
        for r in caplog.records
    )


def test_projects_deleted_longer_ago_than_the_retention_are_purged_at_start_up(
    tmp_path, project, caplog, monkeypatch
):
    store = Store(tmp_path / "data" / DATABASE_NAME)
    recent = store.create_project("Recent", "recent.fieldbook", TEXT)
    store.delete_project(project)
    store.delete_project(recent)
    with closing(sqlite3.connect(tmp_path / "data" / DATABASE_NAME)) as raw:
        raw.execute(
            "UPDATE projects SET deleted = '2026-01-01T00:00:00+00:00' WHERE id = ?", (project,)
        )
        raw.commit()
    monkeypatch.setenv("STATIONFIT_KEEP_DELETED_DAYS", "7")
    with caplog.at_level(logging.INFO, logger="stationfit.web"):
        client = TestClient(create_app(tmp_path / "data"))
    assert [p.id for p in store.deleted_projects()] == [recent]
    assert store.runs(project) == []
    page = client.get("/deleted-projects").text
    assert "recent.fieldbook" in page and "7 days" in page
    assert any(
        f"project {project} ('two-blunders.fieldbook') purged for good" in r.getMessage()
        and "kept 7 days" in r.getMessage()
        for r in caplog.records
    )


def test_review_pages_have_no_inline_scripts_or_styles(client, project):
    _decide(client, project, FIRST)
    _rerun(client, project)
    for path in (f"/projects/{project}/review?suggest=1", f"/projects/{project}/compare"):
        html = client.get(path).text
        assert re.findall(r"<script(?![^>]*\bsrc=)[^>]*>", html) == [], path
        assert "<style" not in html and " style=" not in html, path
        assert not re.search(r"<[^>]+\son[a-z]+\s*=", html), path
    html = client.post(f"/projects/{project}/confirm-delete").text
    assert "<style" not in html and " style=" not in html


@pytest.mark.parametrize("project_id", ["0" * 32, "not-an-id"])
def test_review_routes_of_unknown_projects_are_404(client, project_id):
    for path in ("/review", "/compare", "/fieldbook/edited"):
        assert client.get(f"/projects/{project_id}{path}").status_code == 404, path
    for path in ("/edits", "/runs", "/delete", "/confirm-delete"):
        assert client.post(f"/projects/{project_id}{path}").status_code == 404, path


def test_runs_are_numbered_within_their_project_not_by_the_store(client, project):
    """Run ids count every run in the store; a surveyor reads run 1, 2, 3 of this project."""
    _decide(client, project, FIRST)
    _rerun(client, project)
    other = (
        client.post(
            "/projects",
            files={"fieldbook": ("other.fieldbook", TEXT.encode())},
            follow_redirects=False,
        )
        .headers["location"]
        .rsplit("/", 1)[1]
    )
    _decide(client, project, SECOND)
    _rerun(client, project)
    runs = _api(client, project)["runs"]
    assert [r["number"] for r in runs] == [1, 2, 3]
    assert [r["id"] for r in runs] == [1, 2, 4]  # the other project's upload took id 3
    (only,) = _api(client, other)["runs"]
    assert (only["id"], only["number"]) == (3, 1)

    other_review = _text(client.get(f"/projects/{other}/review").text)
    assert "Run under review #1," in other_review and "#3" not in other_review
    assert "run #1" in other_review
    compare = client.get(f"/projects/{project}/compare").text
    assert "Run A · #2" in compare and "Run B · #3" in compare and "#4" not in compare
    # the picker shows numbers and sends ids
    assert re.search(r'<option value="4" selected>#3 · ', compare)
    assert client.get(f"/projects/{project}/compare?a=1&b=4").status_code == 200
    assert client.get(f"/api/projects/{project}/runs/4").json()["number"] == 3
    assert "Run under review #3," in _text(client.get(f"/projects/{project}/review").text)


# ---------------------------------------------------------------------------------------
# correcting a misbooked value


def _booked(line: int) -> str:
    return TEXT.splitlines()[line - 1].split()[3]


def test_correcting_a_misbooked_value_reruns_with_it_and_keeps_the_review_trail(client, project):
    booked = _booked(FIRST)
    right = f"{float(booked) - 0.015:+.5f}"  # the blunder injected on this line is +15 mm
    review = client.get(f"/projects/{project}/review").text
    assert f'placeholder="{booked}"' in _observation_block(review, FIRST)  # what is replaced
    queued = _decide(
        client, project, FIRST, action="correct", value=right, reason="rod read 15 mm high"
    )
    assert queued.status_code == 303
    review = client.get(f"/projects/{project}/review").text
    assert f"Queued: correct the value from {booked} to {right}" in _text(
        _observation_block(review, FIRST)
    )

    rerun = _rerun(client, project)
    assert rerun.status_code == 303
    body = _api(client, project)
    edit = body["runs"][-1]["edits"][0]
    assert {k: edit[k] for k in ("line", "action", "value", "previous", "reason")} == {
        "line": FIRST,
        "action": "correct",
        "value": right,
        "previous": booked,
        "reason": "rod read 15 mm high",
    }
    observation = next(o for o in body["result"]["observations"] if o["line"] == FIRST)
    assert observation["booked"] == float(right) and not observation["ignored"]
    assert not observation["flagged"]
    assert abs(observation["residual"]) < 0.004  # 1 mm levelling noise, not 15 mm

    compare = client.get(rerun.headers["location"]).text
    corrected = _text(re.search(r'id="corrected".*?</section>', compare, re.DOTALL).group(0))
    assert f"{float(booked):.4f} {float(right):.4f}" in corrected
    assert f"Correct the value from {booked} to {right}" in _text(compare)
    assert "rod read 15 mm high" in compare and edit["date"] in compare

    # the trail on the review page, and the original kept in the edited field book
    review = _text(client.get(f"/projects/{project}/review").text)
    assert f"Correct the value from {booked} to {right} level M2 → M4 rod read 15 mm high" in review
    line = client.get(f"/projects/{project}/fieldbook/edited").text.splitlines()[FIRST - 1]
    assert line == (
        f"level M2 M4 {right}  # corrected from {booked} on {edit['date']}: rod read 15 mm high"
    )
    assert client.get(f"/projects/{project}/fieldbook").content == TEXT.encode()


@pytest.mark.parametrize(
    ("value", "message"),
    [
        ("1.2.3", "the corrected value does not read: '1.2.3' is not a number"),
        ("0.5m", "leave out the unit"),
        ("", "type the corrected value"),
        ("1 2", "without spaces"),
        ("9" * 60, "too long"),
    ],
)
def test_a_malformed_correction_is_refused_beside_the_observation(client, project, value, message):
    response = _decide(client, project, FIRST, action="correct", value=value, reason="misread")
    assert response.status_code == 422
    block = _observation_block(response.text, FIRST)
    assert "field-error" in block and message in unescape(_text(block))
    assert '<details class="decide" open>' in block
    assert 'value="correct" checked' in block  # the choice is kept for the second try
    assert "Queued: " not in _text(client.get(f"/projects/{project}/review").text)


def test_a_queued_correction_can_be_undone_and_needs_the_form_token(client, project):
    data = {"line": str(FIRST), "action": "correct", "value": "+1.00000", "reason": "x"}
    assert client.post(f"/projects/{project}/edits", data=data).status_code == 403
    assert _decide(client, project, FIRST, action="correct", value="+1.00000").status_code == 303
    review = client.get(f"/projects/{project}/review").text
    undo = re.search(rf'action="(/projects/{project}/edits/\d+/undo)"', review).group(1)
    assert (
        client.post(undo, data={"token": _token(review)}, follow_redirects=False).status_code == 303
    )
    assert "Queued: " not in _text(client.get(f"/projects/{project}/review").text)
