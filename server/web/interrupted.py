"""Re-running a run the service was stopped in the middle of.

A run left ``running`` when the process died is stored as ``interrupted`` at the
next start-up (``Store.mark_interrupted``).  It has no result, and an upload's
first run has nothing to review, so the results and review pages offer one
button: adjust the field book again with exactly the decisions the interrupted
run was given.  The new run goes through the same background job as an upload.
"""

from __future__ import annotations

from collections.abc import Callable

from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from server.store import projects as service
from server.store.sqlite import Project, Run, Store
from server.web import access, run_parts
from server.web.dependencies import (
    WAIT_FOR_SMALL_JOBS,
    CheckedForm,
    JobsDep,
    ProjectDep,
    RowId,
    StoreDep,
    wait_briefly,
)

router = APIRouter()


@router.post("/projects/{project_id}/runs/{run_id}/retry")
async def retry_interrupted(
    request: Request,
    project: ProjectDep,
    store: StoreDep,
    form: CheckedForm,
    jobs: JobsDep,
    run_id: RowId,
) -> Response:
    """Start the interrupted run again as a new run with the same settings."""
    interrupted = await run_in_threadpool(store.run, project.id, run_id)
    if interrupted is None or interrupted.status != "interrupted":
        raise HTTPException(
            status_code=404, detail="This project has no interrupted run with this number."
        )
    settings = {**(interrupted.settings or {}), "retry_of": interrupted.id}
    new_id = await run_in_threadpool(
        lambda: store.start_run(project.id, settings, by=access.actor(request))
    )
    job = await run_in_threadpool(
        jobs.start,
        new_id,
        lambda progress: _retry(request, store, project, interrupted, progress, new_id),
    )
    await wait_briefly(job, WAIT_FOR_SMALL_JOBS)
    return RedirectResponse(f"/projects/{project.id}", status_code=303)


def _retry(
    request: Request,
    store: Store,
    project: Project,
    interrupted: Run,
    progress: Callable[[str, int], None],
    run_id: int,
) -> None:
    """The retry's job: adjust again, then make its pages' parts for the first view."""
    service.retry_interrupted(store, project, interrupted, progress, run_id)
    run_parts.prepare(request.app, project.id, run_id)
