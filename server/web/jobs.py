"""Adjustments running in the background, with the stage each has reached.

An upload from the browser is stored, its run recorded as ``running``, and the
adjustment started on a worker thread; the results page shows the stage and
iteration until the run is finished in the store.  Small jobs finish within
the short wait of the upload request, so their results open directly.  A run
that the store shows as ``running`` but that no thread of this process holds
was interrupted (the service stopped before it finished).

Every adjustment of an upload, from the browser or the API, takes one of a
fixed number of slots (``AdjustmentQueue``); the others wait their turn in
order of arrival, and the progress page says how many are ahead.
"""

from __future__ import annotations

import contextlib
import logging
import threading
import time
from collections import deque
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Protocol

from server.store.sqlite import RunGone

logger = logging.getLogger("stationfit.web")

#: Stage names of the pipeline in words for the progress page.
STAGE_WORDS = {
    "queued": "waiting to start",
    "parse": "reading the field book",
    "network": "checking the network and its datum",
    "misclosures": "computing loop misclosures",
    "start values": "computing approximate coordinates",
    "iteration": "iterating",
    "statistics": "computing the statistics",
    "result": "writing the results",
}


def stage_words(stage: str, step: int, ahead: int | None, running: int) -> str:
    """A job's stage as a person reads it (``ahead``: adjustments waiting before it)."""
    if stage == "queued" and ahead is not None:
        return (
            f"waiting: {ahead} ahead of this one "
            f"({running} adjustment{'' if running == 1 else 's'} running)"
        )
    text = STAGE_WORDS.get(stage, stage)
    return f"{text} (iteration {step})" if stage == "iteration" else text


class QueueFull(Exception):
    """Too many adjustments are already waiting: the caller should come back later."""


class AdjustmentQueue:
    """At most ``size`` adjustments at once; the rest wait first come, first served.

    A large network takes tens of seconds and hundreds of megabytes; running every
    upload at once shares the same two cores and multiplies the memory, so all of
    them finish late.  ``max_waiting`` bounds the queue itself (0: unbounded).
    """

    def __init__(self, size: int, max_waiting: int = 0) -> None:
        if size < 1:
            raise ValueError("at least one adjustment must be able to run")
        self.size = size
        self.max_waiting = max_waiting
        self._turn = threading.Condition()
        self._running = 0
        self._waiting: deque[object] = deque()

    def check_room(self) -> None:
        """Raise ``QueueFull`` when a new adjustment would have to wait and the queue is full."""
        with self._turn:
            if self._full():
                raise QueueFull(self._waiting_count())

    def _full(self) -> bool:
        return (
            bool(self.max_waiting)
            and self._running >= self.size
            and (len(self._waiting) >= self.max_waiting)
        )

    def _waiting_count(self) -> int:
        return len(self._waiting)

    @contextlib.contextmanager
    def slot(self, ticket: object | None = None, *, bounded: bool = True) -> Iterator[None]:
        """Hold a slot for the ``with`` block, after waiting for one in order of arrival.

        ``ticket`` identifies the waiting place for ``ahead_of``.  Raises ``QueueFull``
        when ``bounded`` and the queue is already full (the caller has not started
        waiting); a run already stored and promised a result passes ``bounded=False``.
        """
        ticket = object() if ticket is None else ticket
        with self._turn:
            if bounded and self._full():
                raise QueueFull(self._waiting_count())
            self._waiting.append(ticket)
            while self._running >= self.size or self._waiting[0] is not ticket:
                self._turn.wait()
            self._waiting.popleft()
            self._running += 1
            self._turn.notify_all()  # the next in line may also fit
        try:
            yield
        finally:
            with self._turn:
                self._running -= 1
                self._turn.notify_all()

    def ahead_of(self, ticket: object) -> int | None:
        """Adjustments waiting ahead of ``ticket``; None once it is no longer waiting."""
        with self._turn:
            for place, waiting in enumerate(self._waiting):
                if waiting is ticket:
                    return place
            return None

    @property
    def running(self) -> int:
        """Adjustments holding a slot now."""
        with self._turn:
            return self._running


class Waiter(Protocol):
    """``job.done``: wait for the run to end (True) or for ``timeout`` seconds (False)."""

    def wait(self, timeout: float | None = None) -> bool: ...

    def is_set(self) -> bool: ...


class RunJob(Protocol):
    """A background adjustment of a stored run, as the routes and the progress page use it."""

    @property
    def done(self) -> Waiter: ...


class BackgroundAdjustments(Protocol):
    """Where stored runs are adjusted: this process's threads (``Jobs``) or worker
    processes through the task queue (``server.web.workers.RemoteJobs``)."""

    queue: AdjustmentQueue

    def check_room(self) -> None: ...

    def start(
        self, run_id: int, work: Callable[[Callable[[str, int], None]], object]
    ) -> RunJob: ...

    def get(self, run_id: int) -> RunJob | None: ...

    def close(self) -> None: ...


@dataclass
class Job:
    """One background adjustment: where it is and whether it has ended."""

    run_id: int
    started: float = field(default_factory=time.monotonic)
    stage: str = "queued"
    step: int = 0
    done: threading.Event = field(default_factory=threading.Event)
    queue: AdjustmentQueue | None = None

    def progress(self, stage: str, step: int) -> None:
        """The pipeline's progress callback."""
        self.stage, self.step = stage, step

    @property
    def ahead(self) -> int | None:
        """Adjustments waiting ahead of this one (None once it has started)."""
        return None if self.queue is None else self.queue.ahead_of(self)

    @property
    def words(self) -> str:
        """The stage as a person reads it."""
        ahead = self.ahead if self.stage == "queued" else None
        running = self.queue.running if self.queue is not None and ahead is not None else 0
        return stage_words(self.stage, self.step, ahead, running)

    @property
    def elapsed(self) -> float:
        """Seconds since the job was started."""
        return time.monotonic() - self.started


class Jobs:
    """The background adjustments of this process, by run id, sharing one queue."""

    def __init__(self, queue: AdjustmentQueue | None = None) -> None:
        self._lock = threading.Lock()
        self._jobs: dict[int, Job] = {}
        self.queue = queue if queue is not None else AdjustmentQueue(1)

    def check_room(self) -> None:
        """``QueueFull`` when a new upload's adjustment would have to wait and the queue is full."""
        self.queue.check_room()

    def close(self) -> None:
        """Nothing to let go: the threads end with their jobs."""

    def start(self, run_id: int, work: Callable[[Callable[[str, int], None]], object]) -> Job:
        """Run ``work(progress)`` on a new thread once the queue gives it a slot.

        The job is forgotten once it ends.
        """
        job = Job(run_id, queue=self.queue)
        with self._lock:
            self._jobs[run_id] = job

        def target() -> None:
            try:
                # The upload checked the room before it was stored; its run is promised.
                with self.queue.slot(job, bounded=False):
                    job.started = time.monotonic()
                    work(job.progress)
            except RunGone:
                # Deleting a project while it adjusts is allowed: the result has nowhere to go.
                logger.info(
                    "run %s: its project was deleted during the adjustment; the result was dropped",
                    run_id,
                )
            except Exception:
                logger.exception("run %s: the background adjustment failed", run_id)
            finally:
                with self._lock:
                    self._jobs.pop(run_id, None)
                job.done.set()

        threading.Thread(target=target, name=f"adjust-run-{run_id}", daemon=True).start()
        return job

    def get(self, run_id: int) -> Job | None:
        """The job of a run still being adjusted by this process, if any."""
        with self._lock:
            return self._jobs.get(run_id)
