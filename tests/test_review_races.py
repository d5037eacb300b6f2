"""The review trail under concurrent clients: what a re-run applies, and no duplicate decisions.

Two surveyors (or two browser tabs) work on one project.  A re-run must apply
exactly the decisions in force when it is stored: a decision undone while the
re-run adjusts must never come back in its result, so such a re-run is refused
with a message and nothing is stored.  Two clients leaving out the same line
must give one queued decision, the second told it is already queued.

Each test runs on SQLite and on PostgreSQL (``store_location`` in conftest.py); the web
tests then adjust in the service's own threads, as ``serve`` does with SQLite.
"""

from __future__ import annotations

import json
import re
import threading
import warnings
from pathlib import Path

import pytest
from fastapi import FastAPI

from server.pipeline import adjust_fieldbook
from server.store import projects as service
from server.store.sqlite import AlreadyQueued, DecisionsChanged, Store
from server.web import create_app
from server.web import review as review_routes
from tests.test_review import TWO_BLUNDERS, leveling_with_blunders

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

TEXT = leveling_with_blunders(TWO_BLUNDERS)
FIRST = next(k for k, line in enumerate(TEXT.splitlines(), 1) if line.startswith("level M2 M4"))
SECOND = next(k for k, line in enumerate(TEXT.splitlines(), 1) if line.startswith("level M6 M7"))


def _exclude(line: int) -> dict:
    return {"line": line, "action": "exclude", "reason": "staff misread", "date": "2026-12-03"}


@pytest.fixture
def app(tmp_path: Path, store_location: Path | str) -> FastAPI:
    if isinstance(store_location, str):
        return create_app(tmp_path / "data", database=store_location, workers=False)
    return create_app(store_location.parent)


@pytest.fixture
def client(app: FastAPI) -> TestClient:
    with TestClient(app) as c:
        yield c


@pytest.fixture
def project(client: TestClient) -> str:
    response = client.post(
        "/projects",
        files={"fieldbook": ("two-blunders.fieldbook", TEXT.encode(), "text/plain")},
        follow_redirects=False,
    )
    assert response.status_code == 303
    return response.headers["location"].rsplit("/", 1)[1]


def _token(client: TestClient, project: str) -> str:
    html = client.get(f"/projects/{project}/review").text
    match = re.search(r'name="token" value="([0-9a-f]{32})"', html)
    assert match
    return match.group(1)


def _decide(client: TestClient, project: str, line: int, token: str):
    return client.post(
        f"/projects/{project}/edits",
        follow_redirects=False,
        data={"token": token, "line": str(line), "action": "exclude", "reason": "staff misread"},
    )


def _observation(client: TestClient, project: str, line: int) -> dict:
    result = client.get(f"/api/projects/{project}").json()["result"]
    return next(o for o in result["observations"] if o["line"] == line)


# ---------------------------------------------------------------------------------------
# a decision undone while another client's re-run adjusts


def test_undo_during_another_clients_rerun_refuses_the_rerun_so_the_undo_holds(
    app, client, project, monkeypatch
):
    token = _token(client, project)
    assert _decide(client, project, FIRST, token).status_code == 303
    assert _decide(client, project, SECOND, token).status_code == 303
    store: Store = app.state.store
    undone = next(p.id for p in store.pending_edits(project) if p.edit["line"] == FIRST)
    real_adjust = service.adjust_fieldbook

    def adjust_while_the_other_client_undoes(*args, **kwargs):
        result = real_adjust(*args, **kwargs)
        # the second client withdraws "leave out FIRST" while this run is adjusting
        response = client.post(
            f"/projects/{project}/edits/{undone}/undo",
            data={"token": token},
            follow_redirects=False,
        )
        assert response.status_code == 303
        return result

    monkeypatch.setattr(service, "adjust_fieldbook", adjust_while_the_other_client_undoes)
    response = client.post(
        f"/projects/{project}/runs", data={"token": token}, follow_redirects=False
    )
    assert response.status_code == 409
    text = re.sub(r"\s+", " ", response.text)
    assert "The decisions changed while this re-run was adjusting" in text
    assert "re-run again" in text

    runs = client.get(f"/api/projects/{project}").json()["runs"]
    assert [r["status"] for r in runs] == ["finished"]  # nothing stored, nothing "running"
    assert _observation(client, project, FIRST)["ignored"] is False  # the undo held
    assert [p.edit["line"] for p in store.pending_edits(project)] == [SECOND]

    monkeypatch.setattr(service, "adjust_fieldbook", real_adjust)
    response = client.post(
        f"/projects/{project}/runs", data={"token": token}, follow_redirects=False
    )
    assert response.status_code == 303  # re-run again: exactly the decision still queued
    assert _observation(client, project, FIRST)["ignored"] is False
    assert _observation(client, project, SECOND)["ignored"] is True
    assert store.pending_edits(project) == []


def test_a_decision_queued_during_a_rerun_is_not_swallowed(app, client, project, monkeypatch):
    token = _token(client, project)
    assert _decide(client, project, FIRST, token).status_code == 303
    real_adjust = service.adjust_fieldbook

    def adjust_while_the_other_client_decides(*args, **kwargs):
        result = real_adjust(*args, **kwargs)
        assert _decide(client, project, SECOND, token).status_code == 303
        return result

    monkeypatch.setattr(service, "adjust_fieldbook", adjust_while_the_other_client_decides)
    response = client.post(
        f"/projects/{project}/runs", data={"token": token}, follow_redirects=False
    )
    assert response.status_code == 409 and "queued after it started" in response.text
    store: Store = app.state.store
    assert sorted(p.edit["line"] for p in store.pending_edits(project)) == sorted([FIRST, SECOND])


# ---------------------------------------------------------------------------------------
# the same rules in the store, interleaved call by call


@pytest.fixture
def store_project(store_location: Path | str) -> tuple[Store, str, int]:
    store = Store(store_location)
    project_id = store.create_project("p", "f.fieldbook", TEXT)
    base = store.add_run(project_id, result=adjust_fieldbook(TEXT))
    return store, project_id, base


def test_store_refuses_a_run_whose_decision_was_undone_meanwhile(store_project):
    store, project_id, base = store_project
    queued = store.add_pending_edit(project_id, _exclude(FIRST))
    run_id = store.start_run(project_id, {"edits": [_exclude(FIRST)], "based_on": base})
    assert store.remove_pending_edit(project_id, queued) is True  # told "done"
    with pytest.raises(DecisionsChanged, match="undone"):
        store.finish_run(run_id, result=adjust_fieldbook(TEXT), consumed=(queued,))
    assert store.run(project_id, run_id) is None
    assert store.latest_run(project_id, finished=True).id == base


def test_two_reruns_with_the_same_queue_store_only_the_first(store_project):
    store, project_id, base = store_project
    queued = store.add_pending_edit(project_id, _exclude(FIRST))
    settings = {"edits": [_exclude(FIRST)], "based_on": base}
    one, two = store.start_run(project_id, settings), store.start_run(project_id, settings)
    result = adjust_fieldbook(TEXT)
    store.finish_run(one, result=result, consumed=(queued,))
    with pytest.raises(DecisionsChanged):
        store.finish_run(two, result=result, consumed=(queued,))
    assert [r.id for r in store.runs(project_id)] == [base, one]


def test_a_failed_rerun_is_stored_even_when_the_queue_changed(store_project):
    store, project_id, base = store_project
    queued = store.add_pending_edit(project_id, _exclude(FIRST))
    run_id = store.start_run(project_id, {"edits": [_exclude(FIRST)], "based_on": base})
    store.remove_pending_edit(project_id, queued)
    store.finish_run(run_id, error="no datum", consumed=(queued,))  # a failure applies nothing
    assert store.run(project_id, run_id).status == "failed"


def test_the_same_decision_is_queued_once(store_project):
    store, project_id, base = store_project
    store.add_pending_edit(project_id, _exclude(FIRST), based_on=base)
    with pytest.raises(AlreadyQueued, match=f"line {FIRST}: the same decision is already queued"):
        store.add_pending_edit(project_id, {**_exclude(FIRST), "reason": "other words"})
    store.add_pending_edit(project_id, _exclude(SECOND))  # another line is another decision
    sd = {"line": FIRST, "action": "sd", "sd": "3mm", "reason": "r", "date": "2026-12-03"}
    store.add_pending_edit(project_id, sd)
    store.add_pending_edit(project_id, {**sd, "sd": "4mm"})  # a different value is not the same
    with pytest.raises(AlreadyQueued):
        store.add_pending_edit(project_id, sd)
    assert len(store.pending_edits(project_id)) == 4


def test_a_decision_checked_against_an_older_run_is_refused(store_project):
    store, project_id, base = store_project
    newer = store.add_run(project_id, result=adjust_fieldbook(TEXT))
    with pytest.raises(DecisionsChanged, match="reload the page"):
        store.add_pending_edit(project_id, _exclude(FIRST), based_on=base)
    store.add_pending_edit(project_id, _exclude(FIRST), based_on=newer)
    assert len(store.pending_edits(project_id)) == 1


# ---------------------------------------------------------------------------------------
# two clients leaving out the same line


def test_two_clients_leaving_out_the_same_line_give_one_decision(app, client, project, monkeypatch):
    token = _token(client, project)
    stale = review_routes._load_state(app.state.store, app.state.store.get_project(project))
    assert _decide(client, project, FIRST, token).status_code == 303
    # the second client's checks ran on the state read before the first decision was stored
    monkeypatch.setattr(review_routes, "_load_state", lambda store, p: stale)
    response = _decide(client, project, FIRST, token)
    monkeypatch.undo()
    assert response.status_code == 409
    assert f"Line {FIRST}: the same decision is already queued" in response.text
    assert [p.edit["line"] for p in app.state.store.pending_edits(project)] == [FIRST]


def test_concurrent_posts_leaving_out_one_line_queue_it_once(app, client, project):
    token = _token(client, project)
    start = threading.Barrier(4)
    codes: list[int] = []

    def post() -> None:
        start.wait()
        codes.append(_decide(client, project, FIRST, token).status_code)

    threads = [threading.Thread(target=post) for _ in range(4)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(60)
    assert sorted(codes)[-1] != 500 and len(codes) == 4
    assert codes.count(303) == 1  # one accepted, the others told it is already queued
    assert [p.edit["line"] for p in app.state.store.pending_edits(project)] == [FIRST]


# ---------------------------------------------------------------------------------------
# results stored compactly


def _database_bytes(store: Store) -> int:
    import sqlite3
    from contextlib import closing

    with closing(sqlite3.connect(store.path)) as raw:
        raw.execute("PRAGMA wal_checkpoint(TRUNCATE)")  # count what the file really holds
    return sum(f.stat().st_size for f in store.path.parent.iterdir())


def test_a_rerun_of_a_large_field_book_adds_a_few_times_its_size_not_thirty(tmp_path):
    from bench.networks import leveling

    text = leveling(1500)  # about 1,600 observations, 59 KB
    result = adjust_fieldbook(text)
    store = Store(tmp_path / "store.sqlite3")
    project_id = store.create_project("big", "big.fieldbook", text)
    store.add_run(project_id, result=result)
    before = _database_bytes(store)
    run_id = store.start_run(project_id, {"edits": [], "based_on": None})
    store.finish_run(run_id, result=result, consumed=())
    growth = _database_bytes(store) - before
    # stored as JSON text a run took about 34 times the field book; compressed about 5.4
    assert growth < 8 * len(text.encode())
    stored = store.run(project_id, run_id)
    assert stored.result() == result  # nothing lost: the pages rebuild the same result
    assert stored.result_json == json.loads(json.dumps(result.to_json_dict()))


def test_results_are_stored_compressed_on_both_back_ends(store_location):
    from bench.networks import leveling

    text = leveling(1500)
    result = adjust_fieldbook(text)
    store = Store(store_location)
    project_id = store.create_project("big", "big.fieldbook", text)
    run_id = store.add_run(project_id, result=result)
    sql = f"SELECT {{f}}(result) + {{f}}(detail) FROM runs WHERE id = {run_id}"
    if isinstance(store_location, str):
        import psycopg

        with psycopg.connect(store_location) as raw:
            (stored,) = raw.execute(sql.format(f="octet_length")).fetchone()
    else:
        import sqlite3
        from contextlib import closing

        with closing(sqlite3.connect(store_location)) as raw:
            (stored,) = raw.execute(sql.format(f="length")).fetchone()
    as_text = len(json.dumps(result.to_json_dict())) + len(json.dumps(result.detail_dict()))
    assert stored < as_text / 4  # zlib on the numbers and repeated keys: measured about 1/6
    assert store.run(project_id, run_id).result() == result


def test_runs_stored_as_json_text_before_compression_are_still_read(tmp_path):
    """SQLite only: a PostgreSQL database never held runs from before compression."""
    import sqlite3
    from contextlib import closing

    store = Store(tmp_path / "store.sqlite3")
    project_id = store.create_project("p", "f.fieldbook", TEXT)
    base = store.add_run(project_id, result=adjust_fieldbook(TEXT))
    result = adjust_fieldbook(TEXT)
    contract = json.dumps(result.to_json_dict())
    detail = json.dumps(result.detail_dict())
    with closing(sqlite3.connect(store.path)) as raw:  # a row as the earlier version wrote it
        raw.execute(
            "INSERT INTO runs (project_id, created, status, result, detail, summary, "
            "settings) VALUES (?, '2026-01-01T00:00:00+00:00', 'finished', ?, ?, "
            "'{}', '{\"edits\": []}')",
            (project_id, contract, detail),
        )
        raw.commit()
    old = store.latest_run(project_id)
    assert old.id != base and old.result() == result
    assert old.result_json == json.loads(contract)
    runs = store.runs(project_id)  # the list of runs leaves the dumps unread
    assert [r.result_json for r in runs] == [None, None]
    assert [store.run(project_id, r.id).result_json == json.loads(contract) for r in runs] == [
        True,
        True,
    ]


def test_undoing_a_decision_another_clients_rerun_already_applied_says_so(app, client, project):
    token = _token(client, project)
    assert _decide(client, project, FIRST, token).status_code == 303
    store: Store = app.state.store
    (queued,) = store.pending_edits(project)
    rerun = client.post(f"/projects/{project}/runs", data={"token": token}, follow_redirects=False)
    assert rerun.status_code == 303  # the other client's re-run applied the decision
    response = client.post(
        f"/projects/{project}/edits/{queued.id}/undo", data={"token": token}, follow_redirects=False
    )
    assert response.status_code == 409
    assert "This decision is no longer queued: a re-run has already applied it" in (
        re.sub(r"\s+", " ", response.text)
    )
    assert _observation(client, project, FIRST)["ignored"] is True  # still in force, as shown
