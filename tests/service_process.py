"""The real service as a child process on 127.0.0.1, for load and crash tests.

``python -m server serve --port PORT --data DIR`` is started with its output
in a log file; ``ServiceProcess`` waits for the port, and stops the child
with SIGTERM, or kills it with SIGKILL when a test asks.  Every wait is
bounded.
"""

from __future__ import annotations

import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path
from typing import Self

REPO = Path(__file__).resolve().parents[1]


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


class ServiceProcess:
    """One ``serve`` child; use as a context manager (stopped, or killed, on exit)."""

    def __init__(
        self,
        data: Path,
        log: Path,
        *,
        env: dict[str, str] | None = None,
        args: tuple[str, ...] = (),
    ) -> None:
        self.data, self.log, self.port = data, log, free_port()
        self.env = {**os.environ, **(env or {})}
        self.args = args
        self.process: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    @property
    def database(self) -> Path:
        return self.data / "stationfit.sqlite3"

    def __enter__(self) -> Self:
        with self.log.open("ab") as sink:
            self.process = subprocess.Popen(
                [
                    sys.executable,
                    "-m",
                    "server",
                    "serve",
                    "--host",
                    "127.0.0.1",
                    "--port",
                    str(self.port),
                    "--data",
                    str(self.data),
                    *self.args,
                ],
                cwd=REPO,
                stdout=sink,
                stderr=sink,
                env=self.env,
            )
        deadline = time.monotonic() + 30
        while True:
            if self.process.poll() is not None:
                raise RuntimeError(
                    f"the service exited with {self.process.returncode}: "
                    f"{self.log.read_text(errors='replace')}"
                )
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.2):
                    return self
            except OSError:
                if time.monotonic() > deadline:
                    self.kill()
                    raise RuntimeError(f"the service did not open port {self.port}") from None
                time.sleep(0.05)

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def stop(self) -> None:
        """SIGTERM, then SIGKILL if it has not ended within 15 s."""
        if self.process is None or self.process.poll() is not None:
            return
        self.process.terminate()
        try:
            self.process.wait(timeout=15)
        except subprocess.TimeoutExpired:
            self.kill()

    def kill(self) -> None:
        """SIGKILL: the process ends at once, mid-write if it was writing."""
        if self.process is None or self.process.poll() is not None:
            return
        os.kill(self.process.pid, signal.SIGKILL)
        self.process.wait(timeout=15)


def integrity_check(database: Path) -> str:
    """SQLite's own verdict on the file ('ok' when sound)."""
    connection = sqlite3.connect(f"file:{database}?mode=ro", uri=True, timeout=30)
    try:
        return "; ".join(row[0] for row in connection.execute("PRAGMA integrity_check"))
    finally:
        connection.close()


def run_states(database: Path) -> list[tuple[int, str, str]]:
    """(run id, project id, status) of every run, read straight from the database."""
    connection = sqlite3.connect(f"file:{database}?mode=ro", uri=True, timeout=30)
    try:
        return list(connection.execute("SELECT id, project_id, status FROM runs ORDER BY id"))
    finally:
        connection.close()


class WorkerProcess:
    """One ``python -m server worker --database URL`` child, ready once it says so."""

    def __init__(self, database: str, log: Path, *args: str) -> None:
        self.database, self.log, self.args = database, log, args
        self.process: subprocess.Popen[bytes] | None = None

    def __enter__(self) -> Self:
        with self.log.open("ab") as sink:
            self.process = subprocess.Popen(
                [sys.executable, "-m", "server", "worker", "--database", self.database, *self.args],
                cwd=REPO,
                stdout=sink,
                stderr=sink,
            )
        deadline = time.monotonic() + 60
        while b"taking adjustments" not in self.log.read_bytes():
            if self.process.poll() is not None or time.monotonic() > deadline:
                self.kill()
                raise RuntimeError(f"the worker did not start: {self.log.read_text()}")
            time.sleep(0.05)
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    @property
    def pid(self) -> int:
        assert self.process is not None
        return self.process.pid

    def stop(self) -> None:
        """SIGTERM (the worker finishes the job in hand), then SIGKILL after 30 s."""
        if self.process is None or self.process.poll() is not None:
            return
        self.process.terminate()
        try:
            self.process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            self.kill()

    def kill(self) -> None:
        if self.process is None or self.process.poll() is not None:
            return
        os.kill(self.process.pid, signal.SIGKILL)
        self.process.wait(timeout=15)
