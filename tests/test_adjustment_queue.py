"""The adjustment queue: a fixed number at once, the rest in order with their place shown."""

from __future__ import annotations

import threading
import time
import warnings
from pathlib import Path

import pytest

from server.pipeline import UNLIMITED, adjust_parsed
from server.store import projects as routes
from server.web import create_app, dependencies
from server.web.jobs import AdjustmentQueue, QueueFull

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2
    from fastapi.testclient import TestClient

DEMO = Path(__file__).resolve().parents[1] / "demo_projects" / "leveling_clean.fieldbook"
WAIT = 20.0  # generous: only reached when something is wrong


def eventually(condition, what: str) -> None:
    """Poll ``condition`` until it holds (never a timing assertion, only a give-up)."""
    deadline = time.monotonic() + WAIT
    while not condition():
        assert time.monotonic() < deadline, f"never happened: {what}"
        time.sleep(0.01)


def test_the_queue_runs_one_at_a_time_in_order_of_arrival():
    queue = AdjustmentQueue(1)
    release, order = threading.Event(), []
    tickets = [object() for _ in range(3)]

    def work(n: int) -> None:
        with queue.slot(tickets[n]):
            order.append(n)
            if n == 0:
                assert release.wait(WAIT)

    threads = [threading.Thread(target=work, args=(0,))]
    threads[0].start()
    eventually(lambda: order == [0], "the first adjustment starts")
    for n in (1, 2):
        threads.append(threading.Thread(target=work, args=(n,)))
        threads[n].start()
        eventually(lambda n=n: queue.ahead_of(tickets[n]) == n - 1, f"job {n} waits")
    assert (queue.ahead_of(tickets[1]), queue.ahead_of(tickets[2]), queue.running) == (0, 1, 1)
    release.set()
    for thread in threads:
        thread.join(WAIT)
    assert order == [0, 1, 2]
    assert queue.running == 0 and queue.ahead_of(tickets[2]) is None


def test_a_full_queue_refuses_at_once_instead_of_waiting():
    queue = AdjustmentQueue(1, max_waiting=1)
    release, holding = threading.Event(), threading.Event()

    def hold() -> None:
        with queue.slot():
            holding.set()
            release.wait(WAIT)

    def wait_in_line() -> None:
        with queue.slot():
            pass

    first, second = threading.Thread(target=hold), threading.Thread(target=wait_in_line)
    first.start()
    assert holding.wait(WAIT)
    second.start()
    eventually(lambda: len(queue._waiting) == 1, "the second waits")
    with pytest.raises(QueueFull):
        queue.check_room()
    with pytest.raises(QueueFull), queue.slot():
        pass
    release.set()
    first.join(WAIT)
    second.join(WAIT)
    queue.check_room()  # room again


@pytest.fixture
def blocked(tmp_path, monkeypatch):
    """A service with one slot whose first adjustment waits for the test's release."""
    release, entered = threading.Event(), []

    def held(book, *, progress=None, limits=UNLIMITED):
        entered.append(book.source)
        if len(entered) == 1:
            assert release.wait(WAIT), "the test never released the adjustment"
        return adjust_parsed(book, progress=progress, limits=limits)

    monkeypatch.setattr(routes, "adjust_parsed", held)
    monkeypatch.setattr(dependencies, "WAIT_FOR_SMALL_JOBS", 0.05)
    app = create_app(tmp_path, adjustments_at_once=1, max_waiting=2)
    with TestClient(app) as client:
        yield client, app, release, entered
        release.set()


def upload(name: str) -> dict:
    return {"files": {"fieldbook": (name, DEMO.read_bytes(), "text/plain")}}


def test_waiting_uploads_show_how_many_are_ahead_then_their_results(blocked):
    client, app, release, entered = blocked
    urls = []
    for n in range(3):
        posted = client.post("/projects", follow_redirects=False, **upload(f"book{n}.fieldbook"))
        assert posted.status_code == 303
        urls.append(posted.headers["location"])
    eventually(lambda: entered == ["book0.fieldbook"], "the first adjustment holds the slot")
    assert "Iterating" in client.get(urls[0]).text or "Adjusting" in client.get(urls[0]).text
    eventually(
        lambda: "Waiting: 1 ahead of this one" in client.get(urls[2]).text,
        "the third upload shows its place",
    )
    second = client.get(urls[1]).text
    assert "Waiting: 0 ahead of this one" in second and "Waiting for its turn" in second
    assert "Waiting for its turn" not in client.get(urls[0]).text  # the first is adjusting
    # the queue is full (one running, two waiting): a fourth upload is refused, not stored
    before = len(client.get("/api/projects").json()["projects"])
    refused = client.post("/projects", **upload("book3.fieldbook"))
    assert refused.status_code == 503 and "busy" in refused.text
    api_refused = client.post("/api/adjust", **upload("book3.fieldbook"))
    assert api_refused.status_code == 503
    assert api_refused.headers["retry-after"] == "30"
    assert len(client.get("/api/projects").json()["projects"]) == before
    release.set()
    eventually(lambda: not app.state.jobs._jobs, "every queued adjustment ends")
    assert entered == ["book0.fieldbook", "book1.fieldbook", "book2.fieldbook"]  # in order
    for url in urls:
        assert "Passes" in client.get(url).text  # the clean demo's verdict


def test_the_api_waits_for_a_slot_too(tmp_path, monkeypatch):
    app = create_app(tmp_path, adjustments_at_once=1, max_waiting=5)
    queue = app.state.jobs.queue
    started = []
    real = routes.adjust_fieldbook

    def recording(*args, **kwargs):
        started.append(queue.running)
        return real(*args, **kwargs)

    monkeypatch.setattr(routes, "adjust_fieldbook", recording)
    release, holding, answers = threading.Event(), threading.Event(), []

    def hold() -> None:
        with queue.slot():
            holding.set()
            release.wait(WAIT)

    holder = threading.Thread(target=hold)
    holder.start()
    assert holding.wait(WAIT)
    with TestClient(app) as client:
        caller = threading.Thread(
            target=lambda: answers.append(client.post("/api/adjust", **upload("api.fieldbook")))
        )
        caller.start()
        eventually(lambda: len(queue._waiting) == 1, "the API request waits in the queue")
        assert started == [] and answers == []  # it has not started while the slot is held
        release.set()
        caller.join(WAIT)
    holder.join(WAIT)
    assert started == [1]  # it ran holding the one slot
    assert answers[0].status_code == 200
    assert answers[0].json()["summary"]["global_test"]["passed"] is True


def test_a_stored_result_is_shown_without_the_queue_but_a_preset_rerun_waits_its_turn(tmp_path):
    app = create_app(tmp_path, adjustments_at_once=1, max_waiting=1)
    queue = app.state.jobs.queue
    project_id, result, _ = routes.submit(
        app.state.store, routes.Upload(DEMO.read_bytes(), DEMO.name, "")
    )
    assert result is not None
    release, holding = threading.Event(), threading.Event()

    def hold() -> None:
        with queue.slot():
            holding.set()
            release.wait(WAIT)

    def wait_in_line() -> None:
        with queue.slot():
            pass

    holder, waiter = threading.Thread(target=hold), threading.Thread(target=wait_in_line)
    holder.start()
    assert holding.wait(WAIT)
    waiter.start()
    eventually(lambda: len(queue._waiting) == 1, "the queue is full")
    try:
        with TestClient(app) as client:
            stored = client.get(f"/projects/{project_id}")
            assert stored.status_code == 200 and "Passes" in stored.text
            rerun = client.get(
                f"/projects/{project_id}/points.csv?misclosure=fgcc-1984-second-order-class-I"
            )
            assert rerun.status_code == 503  # adjusting again would have had to queue
    finally:
        release.set()
        holder.join(WAIT)
        waiter.join(WAIT)
