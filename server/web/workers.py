"""Adjustments on worker processes, through procrastinate's PostgreSQL task queue.

With the projects in PostgreSQL, ``serve`` does not adjust uploads itself: it stores the
run as ``running`` (as always) and defers one job naming the run to procrastinate's queue
in the same database.  ``python -m server worker --database …`` processes, on this
machine or others, take the jobs; each adjusts the run from what is stored (the field
book, the run's decisions) and writes the stage it has reached to ``run_progress``, which
the progress page reads.

Nothing is lost when a worker dies mid-job (killed, out of memory, machine off): its
heartbeat stops, and any live worker gives the job back to the queue
(``recover_stalled``), so another worker adjusts the run from the start.  A run ends
once: ``Store.finish_run`` commits only while the run is still ``running`` (under the
project's row lock), so a job that runs twice (given back while its first worker was
only slow) stores one result and the second attempt stores nothing.  A run whose job
keeps killing its workers is given up after ``MAX_ATTEMPTS`` and stored as
``interrupted``, with the re-run button of any interrupted run.

procrastinate is imported only here, and only when PostgreSQL is used.
"""

from __future__ import annotations

import asyncio
import logging
import os
import socket
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

from server.settings import WorkLimits
from server.store import projects as service
from server.store.projects import Upload
from server.store.sqlite import Actor, Run, RunEnded, RunGone, RunProgress, Store
from server.web.jobs import AdjustmentQueue, QueueFull, stage_words

logger = logging.getLogger("stationfit.worker")

#: The task and queue names in procrastinate's tables.
TASK_NAME = "stationfit.adjust_run"
QUEUE_NAME = "adjustments"
#: Attempts at one run (the first and the retries after a worker died) before giving up.
MAX_ATTEMPTS = 3
#: Seconds between a worker's heartbeats, and without one before its jobs are given back.
HEARTBEAT_SECONDS = 10.0
STALLED_AFTER_SECONDS = 30.0
#: Seconds between two polls of a run's state while a request waits for it.
POLL_SECONDS = 0.1
#: The advisory lock held while stalled jobs are given back (one worker at a time).
_RECOVERY_LOCK = 0x57A7_0B5E
#: How this process is named in the log: host and process id.
WORKER_NAME = f"{socket.gethostname()}:{os.getpid()}"


def _procrastinate() -> Any:
    try:
        import procrastinate
    except ImportError:  # pragma: no cover - the office extra is not installed
        raise RuntimeError(
            "PostgreSQL service needs procrastinate and psycopg: pip install -e '.[office]'"
        ) from None
    return procrastinate


def ensure_queue_schema(url: str) -> None:
    """Create procrastinate's tables in the database once (under an advisory lock)."""
    import psycopg

    schema = _procrastinate().schema.SchemaManager.get_schema()
    with psycopg.connect(url, autocommit=True) as connection, connection.transaction():
        connection.execute("SELECT pg_advisory_xact_lock(%s)", (_RECOVERY_LOCK,))
        row = connection.execute("SELECT to_regclass('procrastinate_jobs')").fetchone()
        if row is None or row[0] is None:
            connection.execute(schema)
            logger.info("created the task queue's tables")


# --------------------------------------------------------------------------------------
# the service's side: defer, wait, show progress


class _RunDone:
    """``job.done`` of a run adjusted elsewhere: ``wait`` polls the database."""

    def __init__(self, store: Store, run_id: int) -> None:
        self._store, self._run_id = store, run_id

    def is_set(self) -> bool:
        found = self._store.run_status(self._run_id)
        return found is None or found[1] != "running"

    def wait(self, timeout: float | None = None) -> bool:
        deadline = None if timeout is None else time.monotonic() + timeout
        while not self.is_set():
            if deadline is not None and time.monotonic() >= deadline:
                return False
            time.sleep(POLL_SECONDS)
        return True


@dataclass
class RemoteJob:
    """A run on the task queue as the progress page shows it (read from the database)."""

    run_id: int
    done: _RunDone
    progress: RunProgress | None = None

    @property
    def stage(self) -> str:
        return self.progress.stage if self.progress else "queued"

    @property
    def ahead(self) -> int | None:
        return self.progress.ahead if self.progress else None

    @property
    def words(self) -> str:
        if self.progress is None:
            return stage_words("queued", 0, None, 0)
        p = self.progress
        return stage_words(p.stage, p.step, p.ahead, p.adjusting)

    @property
    def elapsed(self) -> float:
        if self.progress is None or self.progress.started is None:
            return 0.0
        started = datetime.fromisoformat(self.progress.started)
        return max(0.0, (datetime.now(UTC) - started).total_seconds())


class RemoteJobs:
    """The service's adjustments of stored runs, handed to worker processes.

    Adjustments that are not stored runs (``POST /api/adjust``, accuracy presets, the
    monitoring page) still take a slot of this process's ``queue``.
    """

    def __init__(self, store: Store, url: str, queue: AdjustmentQueue, max_waiting: int) -> None:
        procrastinate = _procrastinate()
        ensure_queue_schema(url)
        self.store = store
        self.queue = queue
        self.max_waiting = max_waiting
        self.app = procrastinate.App(
            connector=procrastinate.SyncPsycopgConnector(conninfo=url)
        ).open()

    def close(self) -> None:
        self.app.close()

    def check_room(self) -> None:
        """``QueueFull`` when ``max_waiting`` runs already wait for a worker (0: no bound)."""
        if self.max_waiting:
            waiting = self.store.waiting_runs()
            if waiting >= self.max_waiting:
                raise QueueFull(waiting)

    def start(self, run_id: int, work: object = None) -> RemoteJob:
        """Defer the adjustment of the stored run ``run_id`` to the workers.

        ``work`` (the in-process closure) is not used: a worker rebuilds the same work
        from the stored run (``projects.adjust_stored_run``).
        """
        try:
            self.app.configure_task(TASK_NAME, queue=QUEUE_NAME).defer(run_id=run_id)
        except _procrastinate().exceptions.ConnectorException as exc:
            # The upload is stored; without a job no worker would end its run: say so on
            # the project's page, with the re-run button of an interrupted run.
            logger.warning("run %s: could not be handed to the workers: %s", run_id, exc)
            self.store.interrupt_run(
                run_id,
                "The adjustment could not be handed to the workers (the task queue did not "
                "answer). The field book is stored; re-run it.",
            )
        return RemoteJob(run_id, _RunDone(self.store, run_id))

    def get(self, run_id: int) -> RemoteJob | None:
        """The job of a run still ``running`` (waiting for a worker or being adjusted)."""
        found = self.store.run_status(run_id)
        if found is None or found[1] != "running":
            return None
        return RemoteJob(run_id, _RunDone(self.store, run_id), self.store.progress(run_id))

    def live_runs(self) -> set[int]:
        """Runs that have a job waiting or being done."""
        live = set()
        for status in ("todo", "doing"):
            for job in self.app.job_manager.list_jobs(task=TASK_NAME, status=status):
                run_id = job.task_kwargs.get("run_id")
                if isinstance(run_id, int):
                    live.add(run_id)
        return live

    def submit(
        self,
        upload: Upload,
        max_projects: int,
        limits: WorkLimits,
        wait: float,
        owner: Actor | None = None,
    ) -> tuple[str, Run | None]:
        """Store the upload (owned by ``owner``), defer its adjustment and wait up to ``wait``
        seconds for it: (project id, the run as it then stands)."""
        project_id, book, run_id, _ = service.store_upload(
            self.store, upload, max_projects, limits, owner
        )
        if book is not None and run_id is not None:
            self.start(run_id).done.wait(wait)
        return project_id, self.store.latest_run(project_id) or _first_run(self.store, project_id)


def _first_run(store: Store, project_id: str) -> Run | None:
    runs = store.runs(project_id)
    return runs[-1] if runs else None


# --------------------------------------------------------------------------------------
# the worker's side


@dataclass(frozen=True)
class WorkerSettings:
    """How a worker process runs (the command line's options)."""

    concurrency: int = 1
    limits: WorkLimits = field(default_factory=WorkLimits)
    heartbeat_seconds: float = HEARTBEAT_SECONDS
    stalled_after_seconds: float = STALLED_AFTER_SECONDS
    max_attempts: int = MAX_ATTEMPTS


def adjust_job(store: Store, run_id: int, limits: WorkLimits) -> str:
    """The task: adjust the stored run ``run_id`` once; what happened, in words."""
    logger.info("run %s: adjusting on %s", run_id, WORKER_NAME)
    store.set_progress(run_id, "parse", 0)

    def progress(stage: str, step: int) -> None:
        store.set_progress(run_id, stage, step)

    try:
        outcome = service.adjust_stored_run(store, run_id, progress, limits)
    except RunEnded:
        outcome = "already ended by another attempt; this one stored nothing"
    except RunGone:
        outcome = "dropped: its project was deleted during the adjustment"
    logger.info("run %s: %s", run_id, outcome)
    return outcome


def _task_queue(url: str, store: Store, settings: WorkerSettings) -> Any:
    procrastinate = _procrastinate()
    import psycopg

    app = procrastinate.App(connector=procrastinate.PsycopgConnector(conninfo=url))

    def adjust_run(run_id: int) -> str:
        return adjust_job(store, run_id, settings.limits)

    app.task(
        name=TASK_NAME,
        queue=QUEUE_NAME,
        # the database away for a moment: the run is still running, so try again
        retry=procrastinate.RetryStrategy(
            max_attempts=settings.max_attempts,
            wait=5,
            retry_exceptions={psycopg.OperationalError},
        ),
    )(adjust_run)
    return app


async def recover_stalled(app: Any, store: Store, url: str, settings: WorkerSettings) -> list[int]:
    """Give the jobs of dead workers back to the queue (or give up on a run that has used
    its attempts); the run ids handed back.  One worker at a time does it."""
    import psycopg

    procrastinate = _procrastinate()
    handed: list[int] = []
    async with await psycopg.AsyncConnection.connect(url, autocommit=True) as lock:
        cursor = await lock.execute("SELECT pg_try_advisory_lock(%s)", (_RECOVERY_LOCK,))
        row = await cursor.fetchone()
        if not row or not row[0]:
            return handed
        stalled = await app.job_manager.get_stalled_jobs(
            task_name=TASK_NAME, seconds_since_heartbeat=settings.stalled_after_seconds
        )
        for job in stalled:
            run_id = job.task_kwargs.get("run_id")
            if job.attempts + 1 >= settings.max_attempts:
                await app.job_manager.finish_job(
                    job, status=procrastinate.jobs.Status.FAILED, delete_job=False
                )
                if isinstance(run_id, int):
                    await asyncio.to_thread(
                        store.interrupt_run,
                        run_id,
                        f"The adjustment stopped its worker {settings.max_attempts} times "
                        "(out of memory, or the machine stopped), so it was given up.",
                    )
                logger.warning("run %s: given up after %d attempts", run_id, job.attempts + 1)
                continue
            await app.job_manager.retry_job(job)
            if isinstance(run_id, int):
                handed.append(run_id)
            logger.warning(
                "run %s: its worker stopped mid-job; handed back to the queue (attempt %d)",
                run_id,
                job.attempts + 2,
            )
        await lock.execute("SELECT pg_advisory_unlock(%s)", (_RECOVERY_LOCK,))
    return handed


async def _recovery_loop(app: Any, store: Store, url: str, settings: WorkerSettings) -> None:
    every = max(0.5, settings.stalled_after_seconds / 3)
    while True:
        try:
            await recover_stalled(app, store, url, settings)
        except Exception as exc:  # the database away: try again next time
            logger.warning("could not look for stalled jobs: %s", exc)
        await asyncio.sleep(every)


async def run_worker(
    url: str, settings: WorkerSettings, ready: Callable[[], None] | None = None
) -> None:
    """Take adjustment jobs until SIGINT or SIGTERM (a job being adjusted is finished
    first); give back the jobs of dead workers meanwhile."""
    store = Store(url)
    await asyncio.to_thread(ensure_queue_schema, url)
    app = _task_queue(url, store, settings)
    async with app.open_async():
        recovery = asyncio.create_task(_recovery_loop(app, store, url, settings))
        if ready is not None:
            ready()
        try:
            await app.run_worker_async(
                queues=[QUEUE_NAME],
                name=WORKER_NAME,
                concurrency=settings.concurrency,
                update_heartbeat_interval=settings.heartbeat_seconds,
                stalled_worker_timeout=settings.stalled_after_seconds,
                delete_jobs="successful",
                install_signal_handlers=True,
            )
        finally:
            recovery.cancel()
            store.close()
