"""Adjustments running in the background, with the stage each has reached.

An upload from the browser is stored, its run recorded as ``running``, and the
adjustment started on a worker thread; the results page shows the stage and
iteration until the run is finished in the store.  Small jobs finish within
the short wait of the upload request, so their results open directly.  A run
that the store shows as ``running`` but that no thread of this process holds
was interrupted (the service stopped before it finished).
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from ..storage import RunGone

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


@dataclass
class Job:
    """One background adjustment: where it is and whether it has ended."""

    run_id: int
    started: float = field(default_factory=time.monotonic)
    stage: str = "queued"
    step: int = 0
    done: threading.Event = field(default_factory=threading.Event)

    def progress(self, stage: str, step: int) -> None:
        """The pipeline's progress callback."""
        self.stage, self.step = stage, step

    @property
    def words(self) -> str:
        """The stage as a person reads it."""
        text = STAGE_WORDS.get(self.stage, self.stage)
        return f"{text} (iteration {self.step})" if self.stage == "iteration" else text

    @property
    def elapsed(self) -> float:
        """Seconds since the job was started."""
        return time.monotonic() - self.started


class Jobs:
    """The background adjustments of this process, by run id."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._jobs: dict[int, Job] = {}

    def start(self, run_id: int, work: Callable[[Callable[[str, int], None]], None]) -> Job:
        """Run ``work(progress)`` on a new thread; the job is forgotten once it ends."""
        job = Job(run_id)
        with self._lock:
            self._jobs[run_id] = job

        def target() -> None:
            try:
                work(job.progress)
            except RunGone:
                # Deleting a project while it adjusts is allowed: the result has nowhere to go.
                logger.info("run %s: its project was deleted during the adjustment; "
                            "the result was dropped", run_id)
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
