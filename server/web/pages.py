"""Routes: read the request, call the pipeline or the store, render.  No figures computed here."""

from __future__ import annotations

import contextlib
import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any
from urllib.parse import urlencode

from fastapi import APIRouter, HTTPException, Request
from fastapi import Path as PathParameter
from fastapi.responses import (
    HTMLResponse,
    JSONResponse,
    PlainTextResponse,
    RedirectResponse,
    Response,
)
from fastapi.templating import Jinja2Templates
from starlette.concurrency import run_in_threadpool
from starlette.datastructures import UploadFile

from server.report import plot

from server.report import tables as report

from server.report import review
from server.fieldbook.edits import apply_edits
from server.errors import SurveyError
from server.formats.geojson import geojson_text
from server.fieldbook.parser import parse_fieldbook
from server.fieldbook.model import Fieldbook
from server.pipeline import UNLIMITED, adjust_fieldbook, adjust_parsed, check_observation_limit
from server.report.pdf import report_pdf
from server.results.result import AdjustmentResult
from server.settings import RETRY_AFTER_SECONDS, WorkLimits
from server.review.standards import PRESETS, Preset, with_presets
from server.store.sqlite import NO_EDITS, Project, Run, Store
from server.web.app import survey_error_payload
from server.web.jobs import AdjustmentQueue, QueueFull

router = APIRouter()

_UNSAFE_FILENAME = re.compile(r"[^A-Za-z0-9._-]+")
_LINE_BREAK = re.compile(r"\r\n|\r|\n")
_MAX_NAME = 200
#: Seconds an upload from the browser waits for its adjustment before showing progress instead.
_WAIT_FOR_SMALL_JOBS = 2.0


# --------------------------------------------------------------------------------------
# helpers


@dataclass(frozen=True, slots=True)
class Upload:
    """A field book as received: raw bytes, the client's file name and an optional project name."""

    data: bytes
    filename: str
    name: str


def _store(request: Request) -> Store:
    return request.app.state.store  # type: ignore[no-any-return]


def _limits(request: Request) -> WorkLimits:
    return request.app.state.limits  # type: ignore[no-any-return]


def _queue(request: Request) -> AdjustmentQueue:
    return request.app.state.jobs.queue  # type: ignore[no-any-return]


def _busy(exc: QueueFull) -> HTTPException:
    """503 with Retry-After: the queue of adjustments is full; nothing was stored."""
    waiting = exc.args[0] if exc.args else 0
    return HTTPException(
        status_code=503,
        detail=(f"The service is busy: {waiting} adjustments are already waiting their turn. "
                "Nothing was stored or changed; please try again in a minute."),
        headers={"Retry-After": str(RETRY_AFTER_SECONDS)},
    )


def _room_in_queue(request: Request) -> None:
    """Refuse (503) before storing anything when the adjustment queue is full."""
    try:
        _queue(request).check_room()
    except QueueFull as exc:
        raise _busy(exc) from None


def _templates(request: Request) -> Jinja2Templates:
    return request.app.state.templates  # type: ignore[no-any-return]


def _render(
    request: Request, name: str, context: dict[str, Any], status: int = 200
) -> HTMLResponse:
    return _templates(request).TemplateResponse(request, name, context, status_code=status)


def _clean_filename(filename: str | None) -> str:
    """The last path component of a client file name, without control characters."""
    base = re.split(r"[\\/]", filename or "")[-1]
    return "".join(ch for ch in base if ch.isprintable())[:_MAX_NAME]


def _download_name(project: Project, suffix: str) -> str:
    """A file name safe for Content-Disposition, from the upload's name."""
    stem = Path(project.filename).stem if project.filename else project.name
    safe = _UNSAFE_FILENAME.sub("_", stem).strip("._-")[:60]
    return f"{safe or 'stationfit'}{suffix}"


def _attachment(content: str | bytes, media_type: str, filename: str) -> Response:
    return Response(content, media_type=media_type,
                    headers={"Content-Disposition": f'attachment; filename="{filename}"'})


async def _read_upload(request: Request, *, with_text: bool) -> Upload | None:
    """The ``fieldbook`` multipart field (file or text); the web form may paste into ``text``."""
    limit = request.app.state.max_upload_bytes
    async with request.form(max_files=2, max_fields=8, max_part_size=limit) as form:
        item = form.get("fieldbook")
        data, filename = b"", ""
        if isinstance(item, UploadFile):
            data, filename = await item.read(), _clean_filename(item.filename)
        elif isinstance(item, str):
            data = item.encode("utf-8")
        pasted = form.get("text") if with_text else None
        if not data and isinstance(pasted, str) and pasted.strip():
            data, filename = pasted.encode("utf-8"), ""
        name = form.get("name")
        name = name.strip()[:_MAX_NAME] if isinstance(name, str) else ""
    if not data and not filename:
        return None
    return Upload(data=data, filename=filename, name=name)


def _submit(
    store: Store, upload: Upload, max_projects: int = 0, limits: WorkLimits = UNLIMITED,
    queue: AdjustmentQueue | None = None,
) -> tuple[str, AdjustmentResult | None, SurveyError | None]:
    """Store the upload, then adjust it as a run marked ``running`` until it ends.

    The field book is kept even when it cannot be read.  A crash or kill during the
    adjustment leaves the project stored and its run marked ``running`` (never
    finished, never shown as a result); the runs before it are untouched.
    With a ``queue``, the adjustment waits for a slot (the run is stored meanwhile).
    """
    project_id, book, run_id, error = _store_upload(store, upload, max_projects, limits)
    if book is None or run_id is None:
        return project_id, None, error
    with queue.slot(bounded=False) if queue is not None else contextlib.nullcontext():
        result, error = _adjust_run(store, run_id, book, limits=limits)
    return project_id, result, error


def _store_upload(
    store: Store, upload: Upload, max_projects: int = 0, limits: WorkLimits = UNLIMITED
) -> tuple[str, Fieldbook | None, int | None, SurveyError | None]:
    """Store the upload and open its run; a field book that does not read gets a failed run.

    A field book with more observations than ``limits`` allow raises ``FieldbookError``
    and is not stored: it could never be adjusted here, and keeping it fills the store.
    """
    source = upload.filename or "pasted.fieldbook"
    _check_room(store, max_projects)
    try:
        book = parse_fieldbook(upload.data, source=source)
    except SurveyError as exc:
        project_id = store.create_project(upload.name, upload.filename, upload.data)
        store.add_run(project_id, error=exc)
        return project_id, None, None, exc
    check_observation_limit(book, limits)
    project_id = store.create_project(upload.name or book.title, upload.filename, upload.data)
    return project_id, book, store.start_run(project_id, NO_EDITS), None


def _adjust_run(
    store: Store, run_id: int, book: Fieldbook, progress: Callable[[str, int], None] | None = None,
    limits: WorkLimits = UNLIMITED,
) -> tuple[AdjustmentResult | None, SurveyError | None]:
    """Adjust a stored run's field book and finish the run with its result or error."""
    try:
        result = adjust_parsed(book, progress=progress, limits=limits)
    except SurveyError as exc:
        store.finish_run(run_id, error=exc)
        return None, exc
    except Exception:
        # keep the upload and close the run, then let the generic 500 page answer
        store.finish_run(run_id, error="the adjustment stopped unexpectedly")
        raise
    store.finish_run(run_id, result=result)
    return result, None


async def _submit_in_background(request: Request, upload: Upload) -> str:
    """Store and start adjusting; wait briefly so small jobs open straight on their results."""
    store = _store(request)
    limits = _limits(request)
    _room_in_queue(request)
    project_id, book, run_id, _ = await run_in_threadpool(
        _store_upload, store, upload, request.app.state.max_projects, limits
    )
    if book is not None and run_id is not None:
        job = request.app.state.jobs.start(
            run_id, lambda progress: _adjust_run(store, run_id, book, progress, limits)
        )
        await run_in_threadpool(job.done.wait, _WAIT_FOR_SMALL_JOBS)
    return project_id


def _check_room(store: Store, max_projects: int) -> None:
    """Refuse a new project (507) once the store holds ``max_projects`` of them (0: no limit)."""
    if max_projects and len(store.list_projects()) >= max_projects:
        raise HTTPException(
            status_code=507,
            detail=(f"The project store is full ({max_projects} projects). Ask the "
                    "administrator to archive the data folder and delete old projects, or to "
                    "raise STATIONFIT_MAX_PROJECTS."),
        )


#: The largest row id SQLite stores (a signed 64-bit integer).
SQLITE_MAX_ROWID = 2**63 - 1
#: A run or decision number in a URL: a whole number SQLite can hold.  Anything else in
#: its place names nothing, and the app's validation handler answers 404 (not a 500 from
#: the database's integer overflow).
RowId = Annotated[int, PathParameter(ge=1, le=SQLITE_MAX_ROWID)]


def _project_or_404(store: Store, project_id: str) -> Project:
    project = store.get_project(project_id)
    if project is None:
        raise HTTPException(status_code=404, detail="There is no project with this id.")
    return project


def _result_of(project: Project, run: Run | None) -> AdjustmentResult | None:
    """The stored result object; adjusted again only if it was stored by an incompatible version."""
    if run is None or not run.finished:
        return None
    result = run.result()
    if result is None:
        try:
            result = adjust_fieldbook(project.fieldbook, source=project.filename)
        except SurveyError:
            return None
    return result


@dataclass(frozen=True, slots=True)
class StandardsChoice:
    """The accuracy-standard presets asked for with ``?relative=…&misclosure=…`` (None: the file's)."""

    relative: str | None = None
    misclosure: str | None = None

    @property
    def presets(self) -> list[Preset]:
        """The chosen presets, relative first."""
        return [PRESETS[key] for key in (self.relative, self.misclosure) if key is not None]

    @property
    def query(self) -> str:
        """The query string that carries the choice to the downloads ("" for none)."""
        parts = [f"{name}={key}" for name, key in
                 (("relative", self.relative), ("misclosure", self.misclosure)) if key]
        return "?" + "&".join(parts) if parts else ""


def _standards_choice(request: Request) -> StandardsChoice:
    """Presets from the query; a missing or empty value keeps the field book's own tolerance."""
    chosen: dict[str, str | None] = {}
    for kind in ("relative", "misclosure"):
        key = request.query_params.get(kind) or None
        if key is not None and (key not in PRESETS or PRESETS[key].kind != kind):
            choices = ", ".join(k for k, p in PRESETS.items() if p.kind == kind)
            raise HTTPException(status_code=400,
                                detail=f"There is no {kind} preset '{key[:60]}'. Choose one of "
                                       f"{choices}, or leave it empty for the field book's own.")
        chosen[kind] = key
    return StandardsChoice(**chosen)


def _result_with_presets(project: Project, run: Run | None, choice: StandardsChoice,
                         queue: AdjustmentQueue | None = None) -> AdjustmentResult | None:
    """The latest run adjusted again with the chosen presets as its tolerances (decisions kept).

    That adjustment waits for a slot in ``queue`` like any other (503 when it is full).
    """
    if not choice.presets:
        return _result_of(project, run)
    if run is None or not run.finished:
        return None
    edits = review.edits_from_json(run.edits)
    source = project.filename or "pasted.fieldbook"
    try:
        text = apply_edits(project.text, edits, source=source) if edits else project.text
        fieldbook = with_presets(parse_fieldbook(text, source=source),
                                 relative=choice.relative, misclosure=choice.misclosure)
        with queue.slot() if queue is not None else contextlib.nullcontext():
            return adjust_parsed(fieldbook)
    except SurveyError:
        return None
    except QueueFull as exc:
        raise _busy(exc) from None


def _finished_result(store: Store, project_id: str, choice: StandardsChoice | None = None,
                     queue: AdjustmentQueue | None = None) -> tuple[Project, AdjustmentResult]:
    project = _project_or_404(store, project_id)
    result = _result_with_presets(project, store.latest_run(project_id),
                                  choice or StandardsChoice(), queue)
    if result is None:
        raise HTTPException(status_code=404, detail="This project has no adjustment result.")
    return project, result


def display_name(name: str, filename: str, title: str = "") -> str:
    """What a project is called on the pages."""
    return name or title or filename or "Untitled field book"


def _issues_with_text(project: Project, issues: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Field book errors with the text of their line, for the error list."""
    lines = _LINE_BREAK.split(project.text)
    out = []
    for issue in issues:
        number = issue.get("line", 0)
        text = lines[number - 1] if isinstance(number, int) and 0 < number <= len(lines) else ""
        out.append({**issue, "text": text[:300]})
    return out


def _demos(request: Request) -> dict[str, Path]:
    """Demo field books by name, from the listing of the configured folder."""
    folder: Path = request.app.state.demo_dir
    if not folder.is_dir():
        return {}
    return {p.stem: p for p in sorted(folder.glob("*.fieldbook")) if p.is_file()}


def _list_verdict(run: Run | None) -> tuple[str, str]:
    """(state, words) for a project's latest run in the list."""
    if run is None:
        return "none", "Not adjusted"
    if not run.finished or run.summary is None:
        return "fail", _failure_words(run)
    summary = run.summary
    test = summary.get("global_test")
    if not summary.get("converged", True):
        return "fail", "Not converged"
    if test is None:
        return "none", "Not tested (no redundancy)"
    flagged = summary.get("flagged", 0)
    unchecked = summary.get("uncontrolled", 0)
    if test.get("passed"):
        if flagged:
            return "warn", f"Passes, {flagged} flagged"
        if unchecked:
            noun = "observation" if unchecked == 1 else "observations"
            return "warn", f"Passes, but {unchecked} {noun} can no longer be checked"
        return "pass", "Passes"
    return "fail", f"Fails, {flagged} flagged" if flagged else "Fails"


def _failure_words(run: Run) -> str:
    """What the list says of a run that stopped: an upload that failed, or a later re-run."""
    kind = (run.error or {}).get("kind")
    what = {"fieldbook": "field book errors", "network": "the network cannot be adjusted"}
    head = "Upload failed" if run.number <= 1 else "Re-run failed"
    return f"{head}: {what[kind]}" if kind in what else head


def _project_json(project_id: str, name: str, filename: str, created: str, sha256: str,
                  run: Run | None) -> dict[str, Any]:
    return {
        "id": project_id,
        "name": name,
        "filename": filename,
        "created": created,
        "sha256": sha256,
        "status": None if run is None else run.status,
    }


def _run_payload(run: Run | None) -> dict[str, Any]:
    """``result`` (the contract JSON or null) plus the error of a failed run."""
    if run is None:
        return {"result": None}
    if run.finished:
        return {"result": run.result_json}
    error = run.error or {}
    payload: dict[str, Any] = {"result": None, "error": error.get("message", "")}
    if "issues" in error:
        payload["errors"] = error["issues"]
    if "count" in error:  # stored since the count was kept; older failed runs lack it
        payload["error_count"] = error["count"]
    if "points" in error:
        payload["points"] = error["points"]
    return payload


# --------------------------------------------------------------------------------------
# pages


@router.get("/", response_class=HTMLResponse)
def upload_page(request: Request) -> HTMLResponse:
    """The upload form and the demo projects."""
    return _render(request, "index.html", {"demos": list(_demos(request)), "problem": "",
                                           "limit": request.app.state.max_upload_bytes})


@router.post("/projects")
async def create_project(request: Request) -> Response:
    """Store an uploaded field book, adjust it and show the results."""
    upload = await _read_upload(request, with_text=True)
    if upload is None:
        return _render(request, "index.html", {
            "demos": list(_demos(request)),
            "problem": "Choose a field book file or paste its text, then press Adjust.",
            "limit": request.app.state.max_upload_bytes,
        }, status=400)
    project_id = await _submit_in_background(request, upload)
    return RedirectResponse(f"/projects/{project_id}", status_code=303)


@router.get("/projects", response_class=HTMLResponse)
def project_list(request: Request) -> HTMLResponse:
    """Every stored project with its latest verdict."""
    items = []
    for p in _store(request).list_projects():
        summary = (p.latest.summary or {}) if p.latest else {}
        state, words = _list_verdict(p.latest)
        items.append({"id": p.id, "name": display_name(p.name, p.filename), "filename": p.filename,
                      "created": p.created, "points": summary.get("points"),
                      "observations": summary.get("observations"), "state": state,
                      "verdict": words, "failed": p.latest is not None and not p.latest.finished})
    return _render(request, "projects.html", {"projects": items})


# Page numbers beyond this are clamped (to the last page) like any other too-large one.
MAX_PAGE_PARAMETER = 1_000_000


def _page_number(request: Request, key: str) -> int:
    """A ``?obs_page=`` style number: anything unreadable means page 1, too large the last."""
    raw = request.query_params.get(key, "1").strip()
    if not raw.isdigit() or len(raw) > 7:
        return 1 if not raw.isdigit() else MAX_PAGE_PARAMETER
    return min(int(raw), MAX_PAGE_PARAMETER)


def _page_links(request: Request, key: str, page: report.Page | None,
                anchor: str, path: str) -> dict[str, str]:
    """Previous/next addresses of a paged table at ``path``, keeping the other parameters."""
    if page is None or not page.paged:
        return {}
    links = {}
    for name, number in (("previous", page.number - 1), ("next", page.number + 1)):
        if 1 <= number <= page.count:
            params = dict(request.query_params)
            params[key] = str(number)
            links[name] = f"{path}?{urlencode(params)}#{anchor}"
    return links


@router.get("/projects/{project_id}", response_class=HTMLResponse)
def project_page(request: Request, project_id: str) -> HTMLResponse:
    """The results of a project's latest adjustment, or what stopped it."""
    store = _store(request)
    project = _project_or_404(store, project_id)
    runs = store.runs(project_id)
    newest = runs[-1] if runs else None
    interrupted = None
    if newest is not None and newest.status in ("running", "interrupted"):
        job = request.app.state.jobs.get(newest.id)
        if job is not None and newest.status == "running":
            return _render(request, "progress.html", {
                "project": project, "run": newest, "job": job,
                "name": display_name(project.name, project.filename),
            })
        interrupted = newest  # the service stopped before this run finished
    run = store.latest_run(project_id)
    choice = _standards_choice(request)
    result = _result_with_presets(project, run, choice, _queue(request))
    context: dict[str, Any] = {
        "project": project,
        "run": run,
        "name": display_name(project.name, project.filename, result.title if result else ""),
        "error": None,
        "issues": [],
        "interrupted": interrupted,
    }
    if result is not None:
        context.update(report.context(result, choice.presets,
                                      obs_page=_page_number(request, "obs_page"),
                                      pt_page=_page_number(request, "pt_page")))
        here = f"/projects/{project.id}"
        context["observation_links"] = _page_links(
            request, "obs_page", context["observation_page"], "observations", here)
        context["point_links"] = _page_links(
            request, "pt_page", context["point_page"], "points", here)
        context["network_plot"] = plot.network_plot_data(result)
        context["choice"] = choice
        context["download_query"] = choice.query
        context["preset_options"] = {
            kind: [p for p in PRESETS.values() if p.kind == kind]
            for kind in ("relative", "misclosure")
        }
    elif run is not None and run.error is not None:
        context["error"] = run.error
        context["issues"] = _issues_with_text(project, run.error.get("issues", []))
    return _render(request, "results.html", context)


@router.get("/projects/{project_id}/report.html")
def project_report(project_id: str, request: Request) -> Response:
    """The printable report, as a download; its inline style is allowed by hash only."""
    choice = _standards_choice(request)
    project, result = _finished_result(_store(request), project_id, choice, _queue(request))
    css = report.report_css()
    response = _attachment(report.report_html(result, presets=choice.presets),
                           "text/html; charset=utf-8", _download_name(project, "-report.html"))
    response.headers["Content-Security-Policy"] = (
        f"default-src 'none'; style-src {report.style_hash(css)}; base-uri 'none'; "
        "form-action 'none'; frame-ancestors 'none'"
    )
    return response


@router.get("/projects/{project_id}/report.pdf")
def project_report_pdf(project_id: str, request: Request) -> Response:
    """The report as PDF, drawn on the server."""
    choice = _standards_choice(request)
    project, result = _finished_result(_store(request), project_id, choice, _queue(request))
    return _attachment(report_pdf(result, presets=choice.presets), "application/pdf",
                       _download_name(project, "-report.pdf"))


@router.get("/projects/{project_id}/points.csv")
def project_points_csv(project_id: str, request: Request) -> Response:
    """The adjusted points as CSV."""
    project, result = _finished_result(_store(request), project_id, _standards_choice(request),
                                       _queue(request))
    return _attachment(report.points_csv(result), "text/csv; charset=utf-8",
                       _download_name(project, "-points.csv"))


@router.get("/projects/{project_id}/points.geojson")
def project_geojson(project_id: str, request: Request) -> Response:
    """Points and observation lines as GeoJSON (project grid coordinates)."""
    project, result = _finished_result(_store(request), project_id, _standards_choice(request),
                                       _queue(request))
    return _attachment(geojson_text(result), "application/geo+json",
                       _download_name(project, ".geojson"))


@router.get("/projects/{project_id}/result.json")
def project_result_json(project_id: str, request: Request) -> Response:
    """The contract JSON of the latest finished run; with a preset asked for, adjusted again."""
    store = _store(request)
    project = _project_or_404(store, project_id)
    run = store.latest_run(project_id)
    if run is None or run.result_json is None:
        raise HTTPException(status_code=404, detail="This project has no adjustment result.")
    choice = _standards_choice(request)
    body = run.result_json
    if choice.presets:
        _, result = _finished_result(store, project_id, choice, _queue(request))
        body = result.to_json_dict()
    response = JSONResponse(body)
    response.headers["Content-Disposition"] = (
        f'attachment; filename="{_download_name(project, "-result.json")}"'
    )
    return response


@router.get("/projects/{project_id}/fieldbook")
def project_fieldbook(project_id: str, request: Request) -> Response:
    """The field book exactly as uploaded."""
    project = _project_or_404(_store(request), project_id)
    return _attachment(project.fieldbook, "text/plain; charset=utf-8",
                       _download_name(project, ".fieldbook"))


@router.get("/demos/{name}")
def demo_text(name: str, request: Request) -> PlainTextResponse:
    """A demo field book as plain text (looked up by name, never by path)."""
    path = _demos(request).get(name)
    if path is None:
        raise HTTPException(status_code=404, detail="There is no demo project of that name.")
    return PlainTextResponse(path.read_bytes(), headers={"Cache-Control": "no-cache"})


@router.post("/demos/{name}")
async def demo_open(name: str, request: Request) -> Response:
    """Store a demo as a new project, adjust it and show the results."""
    path = _demos(request).get(name)
    if path is None:
        raise HTTPException(status_code=404, detail="There is no demo project of that name.")
    upload = Upload(data=path.read_bytes(), filename=path.name, name="")
    project_id = await _submit_in_background(request, upload)
    return RedirectResponse(f"/projects/{project_id}", status_code=303)


# --------------------------------------------------------------------------------------
# JSON API (the result JSON: docs/result.schema.json)


_MISSING_FIELD = {"error": "send the field book in the multipart field 'fieldbook'"}


def _fieldbook_body(created: str) -> dict[str, Any]:
    """OpenAPI: the multipart upload these routes read by hand, and what they answer."""
    error = {"content": {"application/json": {"schema": {
        "type": "object", "properties": {"error": {"type": "string"}}, "required": ["error"]}}}}
    return {
        "requestBody": {"required": True, "content": {"multipart/form-data": {"schema": {
            "type": "object",
            "required": ["fieldbook"],
            "properties": {
                "fieldbook": {"type": "string", "format": "binary",
                              "description": "The field book (UTF-8 text, docs/fieldbook.md)"},
                "name": {"type": "string", "maxLength": 200},
            },
        }}}},
        "responses": {
            "200" if created == "200" else "201": {"description": "Adjusted (result contract)"},
            "413": {"description": "The upload is larger than the limit", **error},
            "422": {"description": "Field book or network errors, with line numbers or points",
                    **error},
        },
    }


@router.post("/api/adjust", openapi_extra=_fieldbook_body("200"))
async def api_adjust(request: Request) -> JSONResponse:
    """Adjust without storing: the result JSON, or 422 with what to fix."""
    upload = await _read_upload(request, with_text=False)
    if upload is None:
        return JSONResponse(_MISSING_FIELD, status_code=422)
    return await run_in_threadpool(_adjusted_json, upload, _limits(request), _queue(request))


def _adjusted_json(upload: Upload, limits: WorkLimits, queue: AdjustmentQueue) -> JSONResponse:
    """Wait for a slot, adjust and encode on a worker thread: the JSON of a large network
    takes seconds to write, and on the event loop it would hold up every other request."""
    try:
        with queue.slot():
            result = adjust_fieldbook(upload.data, source=upload.filename or "upload.fieldbook",
                                      limits=limits)
    except QueueFull as exc:
        raise _busy(exc) from None
    return JSONResponse(result.to_json_dict())


@router.post("/api/projects", status_code=201, openapi_extra=_fieldbook_body("201"))
async def api_create_project(request: Request) -> JSONResponse:
    """Store and adjust: ``{"id", "result"}``, with ``result`` null and the error when it failed."""
    upload = await _read_upload(request, with_text=False)
    if upload is None:
        return JSONResponse(_MISSING_FIELD, status_code=422)
    _room_in_queue(request)
    return await run_in_threadpool(_stored_json, _store(request), upload,
                                   request.app.state.max_projects, _limits(request),
                                   _queue(request))


def _stored_json(store: Store, upload: Upload, max_projects: int, limits: WorkLimits,
                 queue: AdjustmentQueue) -> JSONResponse:
    """Store, adjust and encode the answer on a worker thread (see ``_adjusted_json``)."""
    project_id, result, error = _submit(store, upload, max_projects, limits, queue)
    body: dict[str, Any] = {"id": project_id,
                            "result": None if result is None else result.to_json_dict()}
    if error is not None:
        body.update(survey_error_payload(error))
    return JSONResponse(body, status_code=201,
                        headers={"Location": f"/api/projects/{project_id}"})


@router.get("/api/projects")
def api_projects(request: Request) -> JSONResponse:
    """Every stored project with the summary of its latest run."""
    projects = []
    for p in _store(request).list_projects():
        item = _project_json(p.id, p.name, p.filename, p.created, p.sha256, p.latest)
        item["summary"] = p.latest.summary if p.latest else None
        projects.append(item)
    return JSONResponse({"projects": projects})


@router.get("/api/projects/{project_id}")
def api_project(project_id: str, request: Request) -> JSONResponse:
    """One project with its latest result."""
    store = _store(request)
    project = _project_or_404(store, project_id)
    run = store.latest_run(project_id)
    body = _project_json(project.id, project.name, project.filename, project.created,
                         project.sha256, run)
    body.update(_run_payload(run))
    body["runs"] = [{"id": r.id, "number": r.number, "created": r.created, "status": r.status,
                     "edits": r.edits, "summary": r.summary} for r in store.runs(project_id)]
    return JSONResponse(body)

