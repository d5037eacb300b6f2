"""The JSON API (the result JSON: docs/result.schema.json).  Large answers are encoded on a
worker thread: the JSON of a large network takes seconds to write, and on the event loop it
would hold up every other request."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool

from server.results.json_writer import json_bytes
from server.settings import WorkLimits
from server.store import projects as service
from server.store.projects import Upload
from server.store.sqlite import Actor, Store
from server.web import access
from server.web.dependencies import (
    JobsDep,
    LimitsDep,
    ProjectDep,
    QueueDep,
    RowId,
    StoreDep,
    busy,
    read_upload,
    room_in_queue,
    survey_error_payload,
)
from server.web.jobs import AdjustmentQueue, BackgroundAdjustments, QueueFull
from server.web.workers import RemoteJobs

router = APIRouter()


class ResultJSONResponse(JSONResponse):
    """A result's JSON encoded as the command line encodes it (orjson, NaN refused), compact."""

    def render(self, content: Any) -> bytes:
        return json_bytes(content, compact=True)


_MISSING_FIELD = {"error": "send the field book in the multipart field 'fieldbook'"}


def _fieldbook_body(created: str) -> dict[str, Any]:
    """OpenAPI: the multipart upload these routes read by hand, and what they answer."""
    error = {
        "content": {
            "application/json": {
                "schema": {
                    "type": "object",
                    "properties": {"error": {"type": "string"}},
                    "required": ["error"],
                }
            }
        }
    }
    return {
        "requestBody": {
            "required": True,
            "content": {
                "multipart/form-data": {
                    "schema": {
                        "type": "object",
                        "required": ["fieldbook"],
                        "properties": {
                            "fieldbook": {
                                "type": "string",
                                "format": "binary",
                                "description": "The field book (UTF-8 text, docs/fieldbook.md)",
                            },
                            "name": {"type": "string", "maxLength": 200},
                        },
                    }
                }
            },
        },
        "responses": {
            "200" if created == "200" else "201": {"description": "Adjusted (result contract)"},
            "413": {"description": "The upload is larger than the limit", **error},
            "422": {
                "description": "Field book or network errors, with line numbers or points",
                **error,
            },
        },
    }


def _adjusted_json(upload: Upload, limits: WorkLimits, queue: AdjustmentQueue) -> JSONResponse:
    try:
        result = service.adjust_upload(upload, limits, queue)
    except QueueFull as exc:
        raise busy(exc) from None
    return ResultJSONResponse(result.to_json_dict())


#: Seconds ``POST /api/projects`` waits for a worker's adjustment (PostgreSQL) before it
#: answers with the run still ``running`` (the project's address then gives the result).
API_WAIT_FOR_WORKERS = 900.0


def _stored_json(
    store: Store,
    upload: Upload,
    max_projects: int,
    limits: WorkLimits,
    jobs: BackgroundAdjustments,
    owner: Actor,
) -> JSONResponse:
    headers = {"Location": ""}
    if isinstance(jobs, RemoteJobs):  # workers adjust it: wait for the run to end
        project_id, run = jobs.submit(upload, max_projects, limits, API_WAIT_FOR_WORKERS, owner)
        body: dict[str, Any] = {"id": project_id, **service.run_payload(run)}
        if run is not None and run.status == "running":
            body["status"] = "running"
    else:
        project_id, result, error = service.submit(
            store, upload, max_projects, limits, jobs.queue, owner
        )
        body = {"id": project_id, "result": None if result is None else result.to_json_dict()}
        if error is not None:
            body.update(survey_error_payload(error))
    headers["Location"] = f"/api/projects/{project_id}"
    return ResultJSONResponse(body, status_code=201, headers=headers)


@router.post("/api/adjust", openapi_extra=_fieldbook_body("200"))
async def api_adjust(request: Request, limits: LimitsDep, queue: QueueDep) -> JSONResponse:
    """Adjust without storing: the result JSON, or 422 with what to fix."""
    upload = await read_upload(request, with_text=False)
    if upload is None:
        return JSONResponse(_MISSING_FIELD, status_code=422)
    return await run_in_threadpool(_adjusted_json, upload, limits, queue)


@router.post("/api/projects", status_code=201, openapi_extra=_fieldbook_body("201"))
async def api_create_project(
    request: Request, store: StoreDep, limits: LimitsDep, jobs: JobsDep
) -> JSONResponse:
    """Store and adjust: ``{"id", "result"}``, with ``result`` null and the error when it failed."""
    upload = await read_upload(request, with_text=False)
    if upload is None:
        return JSONResponse(_MISSING_FIELD, status_code=422)
    await run_in_threadpool(room_in_queue, jobs)
    return await run_in_threadpool(
        _stored_json,
        store,
        upload,
        request.app.state.max_projects,
        limits,
        jobs,
        access.actor(request),
    )


@router.get("/api/projects")
def api_projects(request: Request, store: StoreDep) -> JSONResponse:
    """Every stored project (that the account may see) with the summary of its latest run."""
    return JSONResponse({"projects": service.projects_json(store, access.viewer(request))})


@router.get("/api/projects/{project_id}")
def api_project(project: ProjectDep, store: StoreDep) -> JSONResponse:
    """One project with its latest result."""
    return JSONResponse(service.project_detail_json(store, project))


@router.get("/api/projects/{project_id}/runs/{run_id}")
def api_run(project: ProjectDep, store: StoreDep, run_id: RowId) -> JSONResponse:
    """One run: its settings (the decisions in force) and its result or error."""
    run = store.run(project.id, run_id)
    if run is None:
        raise HTTPException(status_code=404, detail="This project has no run with this number.")
    return JSONResponse(service.run_json(run))
