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

from server.report import review
from server.fieldbook.edits import apply_edits
from server.errors import SurveyError
from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_parsed
from server.store.sqlite import Project, Run, Store
from server.web.review import _check_form, _read_form
from server.web.pages import _WAIT_FOR_SMALL_JOBS, RowId, _project_or_404

router = APIRouter()


def _retry(store: Store, project: Project, interrupted: Run,
           progress: Callable[[str, int], None], run_id: int) -> None:
    """Adjust with the interrupted run's decisions and finish ``run_id``.

    Decisions that were queued for the interrupted re-run are still queued (it never
    finished); this run applies them, so it takes them off the queue when it succeeds.
    """
    try:
        edits = review.edits_from_json(interrupted.edits)
        text = (apply_edits(project.text, edits, source=project.filename) if edits
                else project.text)
        book = parse_fieldbook(text, source=project.filename or "pasted.fieldbook")
        result = adjust_parsed(book, progress=progress)
    except SurveyError as exc:
        store.finish_run(run_id, error=exc)
        return
    except Exception:
        store.finish_run(run_id, error="the adjustment stopped unexpectedly")
        raise
    applied = interrupted.edits  # stored as edit_to_json wrote them, like the queue
    consumed = tuple(p.id for p in store.pending_edits(project.id) if p.edit in applied)
    store.finish_run(run_id, result=result, consumed=consumed)


@router.post("/projects/{project_id}/runs/{run_id}/retry")
async def retry_interrupted(request: Request, project_id: str, run_id: RowId) -> Response:
    """Start the interrupted run again as a new run with the same settings."""
    store: Store = request.app.state.store
    project = _project_or_404(store, project_id)
    form = await _read_form(request)
    _check_form(request, project, form)
    interrupted = await run_in_threadpool(store.run, project.id, run_id)
    if interrupted is None or interrupted.status != "interrupted":
        raise HTTPException(status_code=404,
                            detail="This project has no interrupted run with this number.")
    settings = {**(interrupted.settings or {}), "retry_of": interrupted.id}
    new_id = await run_in_threadpool(store.start_run, project.id, settings)
    job = request.app.state.jobs.start(
        new_id, lambda progress: _retry(store, project, interrupted, progress, new_id)
    )
    await run_in_threadpool(job.done.wait, _WAIT_FOR_SMALL_JOBS)
    return RedirectResponse(f"/projects/{project.id}", status_code=303)
