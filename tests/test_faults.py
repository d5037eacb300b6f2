"""The service killed in the middle of an adjustment, then started again on the same data.

The test starts ``python -m server serve`` as its own child, stores two
projects, uploads a large leveling network (thousands of marks) and, as soon
as the database shows that upload's run as ``running``, sends SIGKILL to the
child: no shutdown code runs, exactly as in a power cut or an out-of-memory
kill.  Then it checks what an operator restarting the service relies on:

* SQLite's integrity check passes and the service starts on the same folder;
* the earlier projects and their runs read back exactly as before;
* the interrupted upload is kept byte for byte, and its run is not shown as
  finished anywhere (no result, no verdict), never half-written;
* the restarted service adjusts new uploads normally.
"""

from __future__ import annotations

import hashlib
import threading
import time
from collections.abc import Callable
from pathlib import Path

import httpx
import numpy as np
import pytest

from tests.service_process import ServiceProcess, integrity_check, run_states
from tests.synthetic import leveling_grid

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"
TIMEOUT_S = 60.0
SIDE = 140  # 19 600 marks: several seconds of adjustment, time enough to be killed in


def _upload(http: httpx.Client, path: Path) -> dict:
    response = http.post("/api/projects", files={"fieldbook": (path.name, path.read_bytes())})
    assert response.status_code == 201, response.text
    return response.json()


def test_kill_during_an_adjustment_loses_nothing_and_finishes_nothing(
    tmp_path: Path, report_figure: Callable[[str], None]
):
    data, log = tmp_path / "data", tmp_path / "service.log"
    big = leveling_grid(np.random.default_rng(11), side=SIDE).encode()
    crashed: dict[str, object] = {}

    with ServiceProcess(data, log) as service:
        with httpx.Client(base_url=service.url, timeout=TIMEOUT_S) as http:
            earlier = [
                _upload(http, DEMOS / "leveling_blunder.fieldbook")["id"],
                _upload(http, DEMOS / "closed_traverse.fieldbook")["id"],
            ]
            before = {pid: http.get(f"/api/projects/{pid}").json() for pid in earlier}
        known_runs = {run_id for run_id, _, _ in run_states(service.database)}

        def send_big() -> None:
            try:
                with httpx.Client(base_url=service.url, timeout=TIMEOUT_S * 3) as http:
                    crashed["response"] = http.post(
                        "/api/projects", files={"fieldbook": ("grid.fieldbook", big)}
                    ).status_code
            except httpx.HTTPError as exc:  # the expected end: the server vanished
                crashed["error"] = type(exc).__name__

        sender = threading.Thread(target=send_big)
        sender.start()
        deadline = time.monotonic() + TIMEOUT_S
        running: list[tuple[int, str, str]] = []
        while not running and sender.is_alive() and time.monotonic() < deadline:
            running = [
                r
                for r in run_states(service.database)
                if r[0] not in known_runs and r[2] == "running"
            ]
            time.sleep(0.01)
        assert running, f"the large upload was never seen running: {crashed}"
        killed_at = time.monotonic()
        service.kill()
        sender.join(timeout=TIMEOUT_S)
        assert not sender.is_alive()
    assert "response" not in crashed, "the adjustment finished before the kill"
    ((run_id, project_id, _),) = running

    assert integrity_check(data / "stationfit.sqlite3") == "ok"
    states = {r[0]: r[2] for r in run_states(data / "stationfit.sqlite3")}
    assert states[run_id] == "running"  # not finished, not failed: interrupted

    restarted = ServiceProcess(data, tmp_path / "service-2.log")
    with restarted as service, httpx.Client(base_url=service.url, timeout=TIMEOUT_S) as http:
        restarted_in = time.monotonic() - killed_at
        for pid in earlier:
            after = http.get(f"/api/projects/{pid}").json()
            assert after == before[pid], pid
        listed = {p["id"]: p for p in http.get("/api/projects").json()["projects"]}
        assert set(listed) == {*earlier, project_id}

        interrupted = http.get(f"/api/projects/{project_id}").json()
        assert interrupted["sha256"] == hashlib.sha256(big).hexdigest()
        assert interrupted["status"] != "finished" and interrupted["result"] is None
        # the restart found the run cut off and stored it as such
        assert [r["status"] for r in interrupted["runs"]] == ["interrupted"]
        assert all(r["summary"] is None for r in interrupted["runs"])
        assert listed[project_id]["summary"] is None
        assert http.get(f"/projects/{project_id}/fieldbook").content == big
        assert http.get(f"/projects/{project_id}/result.json").status_code == 404
        assert http.get(f"/projects/{project_id}/report.html").status_code == 404
        page = http.get(f"/projects/{project_id}")
        assert page.status_code == 200 and "Passes" not in page.text
        assert "was interrupted" in page.text and f"/runs/{run_id}/retry" in page.text
        assert "Not adjusted" in http.get("/projects").text

        fresh = _upload(http, DEMOS / "leveling_clean.fieldbook")
        assert fresh["result"]["summary"]["converged"] is True
    report_figure(
        f"faults: SIGKILL during the adjustment of {SIDE * SIDE} marks; restart after "
        f"{restarted_in:.1f} s: integrity ok, {len(earlier)} earlier projects intact, "
        "interrupted run stored as 'interrupted' with no result and a re-run button, upload "
        "kept byte for byte"
    )


@pytest.mark.parametrize("moment", ["before any write", "after writes"])
def test_kill_while_idle_keeps_the_database_sound(tmp_path: Path, moment: str):
    """The simplest crash: the process killed between requests, once fresh and once busy."""
    data = tmp_path / "data"
    with ServiceProcess(data, tmp_path / "a.log") as service:
        if moment == "after writes":
            with httpx.Client(base_url=service.url, timeout=TIMEOUT_S) as http:
                for _ in range(5):
                    _upload(http, DEMOS / "leveling_blunder.fieldbook")
        service.kill()
    assert integrity_check(data / "stationfit.sqlite3") == "ok"
    again = ServiceProcess(data, tmp_path / "b.log")
    with again as service, httpx.Client(base_url=service.url, timeout=TIMEOUT_S) as http:
        listed = http.get("/api/projects").json()["projects"]
        assert len(listed) == (5 if moment == "after writes" else 0)
        assert all(p["status"] == "finished" for p in listed)
