"""A bounded burst of concurrent users against the real service: nothing lost, nothing corrupt.

Starts ``python -m server serve`` on 127.0.0.1 with a fresh data folder and
sends a fixed plan of 200 requests from 8 concurrent clients, mixing uploads
(``POST /api/projects``), adjustments without storing (``POST /api/adjust``),
project reads (``GET /api/projects/{id}``) and pages.  Every answer is checked
against the same demo adjusted in this process; afterwards every project
created must be listed and readable with its field book's hash, and SQLite's
integrity check must pass.  A second test shows that a large adjustment
(thousands of marks) does not hold up other people's page loads.

The burst stops by itself: a fixed number of requests, each with a timeout,
and an overall deadline after which the clients stop taking work.  Figures
(requests, failures, projects lost, p50/p95 latency) go to a JSON file in the
test's temporary folder, to the closing summary of the run, and are asserted.
"""

from __future__ import annotations

import hashlib
import json
import random
import statistics
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import httpx
import numpy as np
import pytest

from server.pipeline import adjust_fieldbook
from tests.service_process import ServiceProcess, integrity_check
from tests.synthetic import leveling_grid

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"
CLIENTS = 8
REQUESTS = 200
DEADLINE_S = 240.0  # the whole burst; each request also has its own timeout
REQUEST_TIMEOUT_S = 60.0
P95_LIMIT_S = 10.0  # two cores shared by 8 clients: generous, yet far from a hang
# docs/security.md promises these medians; measured 13-75 ms (pages), 30-105 ms (all requests)
# and 9-34 ms (home page during a large adjustment) on the 2-core machine while other test runs
# shared it, so each limit keeps a margin of about two.
PAGE_MEDIAN_LIMIT_S = 0.150
ALL_MEDIAN_LIMIT_S = 0.200
BUSY_PAGE_MEDIAN_LIMIT_S = 0.100
PAGE_KINDS = ("page", "list", "project page")


@dataclass(frozen=True)
class Demo:
    name: str
    data: bytes
    sha256: str
    title: str
    summary: dict
    flagged: list[int]


def _demos() -> list[Demo]:
    demos = []
    for path in sorted(DEMOS.glob("*.fieldbook")):
        data = path.read_bytes()
        result = adjust_fieldbook(data, source=path.name).to_json_dict()
        demos.append(
            Demo(
                path.name,
                data,
                hashlib.sha256(data).hexdigest(),
                result["title"],
                result["summary"],
                [o["line"] for o in result["observations"] if o["flagged"]],
            )
        )
    return demos


@dataclass
class Tally:
    """What the burst saw; shared by the client threads under a lock."""

    lock: threading.Lock = field(default_factory=threading.Lock)
    latencies: dict[str, list[float]] = field(default_factory=dict)
    failures: list[str] = field(default_factory=list)
    created: dict[str, Demo] = field(default_factory=dict)
    done: int = 0

    def record(self, kind: str, seconds: float, problem: str | None) -> None:
        with self.lock:
            self.latencies.setdefault(kind, []).append(seconds)
            self.done += 1
            if problem:
                self.failures.append(f"{kind}: {problem}")


def _same_result(summary: dict, flagged: list[int], demo: Demo) -> str | None:
    keys = ("points", "observations", "used_observations", "unknowns", "redundancy")
    if any(summary[k] != demo.summary[k] for k in keys):
        return f"{demo.name}: summary {summary} differs from {demo.summary}"
    if summary["variance_factor"] != pytest.approx(demo.summary["variance_factor"], rel=1e-9):
        return f"{demo.name}: variance factor {summary['variance_factor']}"
    if flagged != demo.flagged:
        return f"{demo.name}: flagged lines {flagged}, expected {demo.flagged}"
    return None


def _check_upload(response: httpx.Response, demo: Demo, tally: Tally) -> str | None:
    if response.status_code != 201:
        return f"POST /api/projects {demo.name}: {response.status_code} {response.text[:200]}"
    body = response.json()
    result = body["result"]
    flagged = [o["line"] for o in result["observations"] if o["flagged"]]
    problem = _same_result(result["summary"], flagged, demo)
    if problem is None:
        with tally.lock:
            tally.created[body["id"]] = demo
    return problem


def _check_adjust(response: httpx.Response, demo: Demo) -> str | None:
    if response.status_code != 200:
        return f"POST /api/adjust {demo.name}: {response.status_code}"
    body = response.json()
    return _same_result(
        body["summary"], [o["line"] for o in body["observations"] if o["flagged"]], demo
    )


def _check_project(response: httpx.Response, demo: Demo) -> str | None:
    if response.status_code != 200:
        return f"GET project: {response.status_code}"
    body = response.json()
    if body["sha256"] != demo.sha256 or body["status"] != "finished":
        return f"GET project {demo.name}: sha256/status {body['sha256']} {body['status']}"
    return _same_result(
        body["result"]["summary"],
        [o["line"] for o in body["result"]["observations"] if o["flagged"]],
        demo,
    )


def _check_page(response: httpx.Response, needle: str) -> str | None:
    if response.status_code != 200:
        return f"GET {response.request.url.path}: {response.status_code}"
    if needle not in response.text or "Traceback" in response.text:
        return f"GET {response.request.url.path}: {needle!r} missing"
    return None


def _plan(demos: list[Demo]) -> list[str]:
    """The fixed mix of 200 requests (seeded): uploads first so reads have something to read."""
    rng = random.Random(20240607)
    kinds = ["upload"] * 16 + rng.choices(
        ["upload", "adjust", "read", "page", "list", "project page"],
        weights=[3, 2, 3, 1, 1, 2],
        k=REQUESTS - 16,
    )
    return kinds


def _client_loop(
    base: str, work: list[tuple[int, str]], demos: list[Demo], tally: Tally, deadline: float
) -> None:
    rng = random.Random(threading.get_ident())
    with httpx.Client(base_url=base, timeout=REQUEST_TIMEOUT_S) as http:
        while time.monotonic() < deadline:
            with tally.lock:
                if not work:
                    return
                _, kind = work.pop(0)
                known = list(tally.created.items())
            demo = rng.choice(demos)
            if kind in ("read", "project page") and not known:
                kind = "upload"
            started = time.monotonic()
            try:
                if kind == "upload":
                    response = http.post(
                        "/api/projects", files={"fieldbook": (demo.name, demo.data)}
                    )
                    problem = _check_upload(response, demo, tally)
                elif kind == "adjust":
                    response = http.post("/api/adjust", files={"fieldbook": (demo.name, demo.data)})
                    problem = _check_adjust(response, demo)
                elif kind == "read":
                    project_id, demo = rng.choice(known)
                    problem = _check_project(http.get(f"/api/projects/{project_id}"), demo)
                elif kind == "project page":
                    project_id, demo = rng.choice(known)
                    problem = _check_page(http.get(f"/projects/{project_id}"), demo.title[:30])
                elif kind == "list":
                    problem = _check_page(http.get("/projects"), "Projects")
                else:
                    problem = _check_page(http.get("/"), "Adjust")
            except httpx.HTTPError as exc:
                problem = f"{type(exc).__name__}: {exc}"
            tally.record(kind, time.monotonic() - started, problem)


def _percentile(values: list[float], q: float) -> float:
    return float(np.percentile(values, q)) if values else 0.0


@pytest.fixture(scope="module")
def service(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ServiceProcess]:
    top = tmp_path_factory.mktemp("load")
    with ServiceProcess(top / "data", top / "service.log") as process:
        yield process


def test_burst_of_concurrent_users_loses_nothing(
    service: ServiceProcess, tmp_path: Path, report_figure: Callable[[str], None]
):
    demos = _demos()
    tally = Tally()
    work = list(enumerate(_plan(demos)))
    deadline = time.monotonic() + DEADLINE_S
    started = time.monotonic()
    threads = [
        threading.Thread(target=_client_loop, args=(service.url, work, demos, tally, deadline))
        for _ in range(CLIENTS)
    ]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=DEADLINE_S + REQUEST_TIMEOUT_S + 10)
    elapsed = time.monotonic() - started
    assert not any(t.is_alive() for t in threads), "a client did not stop"

    # after the burst: every project created is listed and readable, byte for byte
    with httpx.Client(base_url=service.url, timeout=REQUEST_TIMEOUT_S) as http:
        listed = {p["id"]: p for p in http.get("/api/projects").json()["projects"]}
        lost = [
            pid
            for pid, demo in tally.created.items()
            if pid not in listed
            or listed[pid]["sha256"] != demo.sha256
            or http.get(f"/projects/{pid}/fieldbook").content != demo.data
        ]
    service.stop()
    integrity = integrity_check(service.database)

    every = [s for values in tally.latencies.values() for s in values]
    pages = [s for kind in PAGE_KINDS for s in tally.latencies.get(kind, [])]
    figures = {
        "clients": CLIENTS,
        "requests": tally.done,
        "failures": len(tally.failures),
        "projects_created": len(tally.created),
        "projects_stored": len(listed),
        "projects_lost": len(lost),
        "integrity_check": integrity,
        "seconds": round(elapsed, 2),
        "p50_ms": round(1000 * _percentile(every, 50), 1),
        "page_p50_ms": round(1000 * _percentile(pages, 50), 1),
        "p95_ms": round(1000 * _percentile(every, 95), 1),
        "max_ms": round(1000 * max(every, default=0.0), 1),
        "by_kind": {
            k: {
                "n": len(v),
                "p50_ms": round(1000 * _percentile(v, 50), 1),
                "p95_ms": round(1000 * _percentile(v, 95), 1),
            }
            for k, v in sorted(tally.latencies.items())
        },
    }
    (tmp_path / "load-figures.json").write_text(json.dumps(figures, indent=2))
    report_figure(
        f"load: {figures['requests']} requests from {CLIENTS} clients in {figures['seconds']} s, "
        f"{figures['failures']} failures, {figures['projects_created']} projects created, "
        f"{figures['projects_lost']} lost, p50 {figures['p50_ms']} ms "
        f"(pages {figures['page_p50_ms']} ms), "
        f"p95 {figures['p95_ms']} ms, max {figures['max_ms']} ms, integrity {integrity}"
    )
    print(json.dumps(figures, indent=2))

    assert tally.failures == [], tally.failures[:10]
    assert tally.done == REQUESTS, f"only {tally.done} of {REQUESTS} requests before the deadline"
    assert lost == []
    assert len(listed) == len(tally.created) >= 16
    assert integrity == "ok"
    assert figures["p95_ms"] < 1000 * P95_LIMIT_S
    assert len(pages) >= 20, "too few page loads in the burst to take a median"
    assert statistics.median(pages) < PAGE_MEDIAN_LIMIT_S, figures
    assert statistics.median(every) < ALL_MEDIAN_LIMIT_S, figures


def test_a_large_adjustment_does_not_block_page_loads(
    tmp_path: Path, report_figure: Callable[[str], None]
):
    """While one surveyor adjusts thousands of marks, another's pages still load at once."""
    big = leveling_grid(np.random.default_rng(7), side=110).encode()  # 12 100 marks
    outcome: dict[str, object] = {}

    with ServiceProcess(tmp_path / "data", tmp_path / "service.log") as service:

        def adjust_big() -> None:
            began = time.monotonic()
            with httpx.Client(base_url=service.url, timeout=REQUEST_TIMEOUT_S * 3) as http:
                response = http.post("/api/adjust", files={"fieldbook": ("big", big)})
            outcome["status"] = response.status_code
            outcome["points"] = response.json()["summary"]["points"]
            outcome["seconds"] = time.monotonic() - began

        with httpx.Client(base_url=service.url, timeout=REQUEST_TIMEOUT_S) as http:
            assert http.get("/").status_code == 200  # warm: templates loaded
            worker = threading.Thread(target=adjust_big)
            worker.start()
            time.sleep(0.5)  # the upload is sent and the adjustment under way
            during: list[float] = []
            stop = time.monotonic() + REQUEST_TIMEOUT_S
            while worker.is_alive() and len(during) < 200 and time.monotonic() < stop:
                began = time.monotonic()
                page = http.get("/")
                took = time.monotonic() - began
                assert page.status_code == 200 and "Adjust" in page.text
                if worker.is_alive():
                    during.append(took)
                time.sleep(0.05)
            worker.join(timeout=REQUEST_TIMEOUT_S * 3)
    assert outcome.get("status") == 200 and outcome.get("points") == 110 * 110, outcome
    report_figure(
        f"page loads during a {outcome['seconds']:.1f} s adjustment of 12100 marks: "
        f"{len(during)} loads, median {1000 * statistics.median(during):.0f} ms, "
        f"max {1000 * max(during):.0f} ms"
    )
    assert len(during) >= 3, "the adjustment ended before the pages could be timed"
    assert statistics.median(during) < BUSY_PAGE_MEDIAN_LIMIT_S
    assert max(during) < 2.0
