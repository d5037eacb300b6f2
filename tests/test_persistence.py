"""Nothing is lost when the service stops: projects, runs with their decisions, queued decisions.

Starts the real command (``python -m server serve --data DIR``) as a separate
process, works with it over HTTP, stops it, starts it again on the same data
folder and reads everything back.
"""

from __future__ import annotations

import re
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import pytest

from tests.browser_support import free_port
from tests.test_review import TWO_BLUNDERS, leveling_with_blunders

REPO = Path(__file__).resolve().parents[1]
TEXT = leveling_with_blunders(TWO_BLUNDERS)
FIRST = next(k for k, line in enumerate(TEXT.splitlines(), 1) if line.startswith("level M2 M4"))
SECOND = next(k for k, line in enumerate(TEXT.splitlines(), 1) if line.startswith("level M6 M7"))


@contextmanager
def serving(data: Path, port: int, log: Path) -> Iterator[httpx.Client]:
    """The service running as its own process on ``port``, stopped (SIGTERM) on exit."""
    with log.open("ab") as sink:
        process = subprocess.Popen(
            [sys.executable, "-m", "server", "serve", "--port", str(port), "--data", str(data)],
            cwd=REPO,
            stdout=sink,
            stderr=sink,
        )
    try:
        deadline = time.monotonic() + 30
        while True:
            if process.poll() is not None:
                pytest.fail(f"the service exited with {process.returncode}: {log.read_text()}")
            try:
                with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                    break
            except OSError:
                if time.monotonic() > deadline:
                    pytest.fail(f"the service did not open port {port}: {log.read_text()}")
                time.sleep(0.1)
        with httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=60) as client:
            yield client
    finally:
        process.terminate()
        try:
            process.wait(timeout=15)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=15)


def _token(html: str) -> str:
    return re.search(r'name="token" value="([0-9a-f]{32})"', html).group(1)


def test_projects_runs_and_decisions_survive_a_restart_of_the_service(tmp_path):
    data, log = tmp_path / "data", tmp_path / "service.log"
    port = free_port()
    with serving(data, port, log) as client:
        created = client.post(
            "/api/projects", files={"fieldbook": ("two.fieldbook", TEXT.encode())}
        )
        assert created.status_code == 201
        project = created.json()["id"]
        first_result = created.json()["result"]
        token = _token(client.get(f"/projects/{project}/review").text)
        decision = {
            "token": token,
            "line": str(FIRST),
            "action": "exclude",
            "reason": "staff misread",
        }
        assert client.post(f"/projects/{project}/edits", data=decision).status_code == 303
        assert client.post(f"/projects/{project}/runs", data={"token": token}).status_code == 303
        queued = {**decision, "line": str(SECOND), "reason": "rod not plumb"}
        assert client.post(f"/projects/{project}/edits", data=queued).status_code == 303
        before = client.get(f"/api/projects/{project}").json()
    assert len(before["runs"]) == 2

    with serving(data, free_port(), log) as client:  # a new process, another port
        after = client.get(f"/api/projects/{project}")
        assert after.status_code == 200
        body = after.json()
        assert body["sha256"] == before["sha256"] and body["filename"] == "two.fieldbook"
        assert body["runs"] == before["runs"]
        assert [r["status"] for r in body["runs"]] == ["finished", "finished"]
        assert body["runs"][0]["edits"] == []
        assert [(e["line"], e["reason"]) for e in body["runs"][1]["edits"]] == [
            (FIRST, "staff misread")
        ]
        assert body["result"] == before["result"]
        first = client.get(f"/api/projects/{project}/runs/{body['runs'][0]['id']}").json()
        assert first["result"] == first_result
        assert client.get(f"/projects/{project}/fieldbook").content == TEXT.encode()
        review = client.get(f"/projects/{project}/review").text
        assert "Queued: leave out" in review and "rod not plumb" in review
        listed = client.get("/api/projects").json()["projects"]
        assert [p["id"] for p in listed] == [project]
