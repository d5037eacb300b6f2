"""What every route repeats: the store, the queue, a project by id or 404, the form check,
and the small response helpers the route modules share."""

from __future__ import annotations

import asyncio
import hmac
import re
import threading
import time
from datetime import date
from pathlib import Path
from typing import Annotated, Any
from urllib.parse import urlencode, urlsplit

from fastapi import Depends, HTTPException, Request
from fastapi import Path as PathParameter
from fastapi.responses import HTMLResponse, Response
from fastapi.templating import Jinja2Templates
from starlette.concurrency import run_in_threadpool
from starlette.datastructures import FormData, UploadFile

from server.errors import FieldbookError, NetworkError, SurveyError
from server.report.tables import Page
from server.settings import RETRY_AFTER_SECONDS, WorkLimits
from server.store.projects import ProposalCache, StandardsChoice, UnknownPreset, Upload
from server.store.sqlite import Project, Store, error_record
from server.web import access
from server.web.jobs import AdjustmentQueue, BackgroundAdjustments, QueueFull, RunJob

#: The largest row id SQLite stores (a signed 64-bit integer).
SQLITE_MAX_ROWID = 2**63 - 1
#: A run or decision number in a URL: a whole number SQLite can hold.  Anything else in
#: its place names nothing, and the app's validation handler answers 404 (not a 500 from
#: the database's integer overflow).
RowId = Annotated[int, PathParameter(ge=1, le=SQLITE_MAX_ROWID)]
#: Seconds an upload from the browser waits for its adjustment before showing progress instead.
WAIT_FOR_SMALL_JOBS = 2.0
#: Seconds between two looks at the database while an upload waits for a worker's result.
POLL_FOR_WORKERS = 0.2
#: Page numbers beyond this are clamped (to the last page) like any other too-large one.
MAX_PAGE_PARAMETER = 1_000_000

_UNSAFE_FILENAME = re.compile(r"[^A-Za-z0-9._-]+")
_MAX_FORM_FIELDS = 40
_MAX_FORM_BYTES = 64 * 1024


def get_store(request: Request) -> Store:
    return request.app.state.store  # type: ignore[no-any-return]


def get_limits(request: Request) -> WorkLimits:
    return request.app.state.limits  # type: ignore[no-any-return]


def get_jobs(request: Request) -> BackgroundAdjustments:
    """This process's background adjustments, or the workers' queue (PostgreSQL)."""
    return request.app.state.jobs  # type: ignore[no-any-return]


def get_queue(request: Request) -> AdjustmentQueue:
    return request.app.state.jobs.queue  # type: ignore[no-any-return]


def get_proposals(request: Request) -> ProposalCache:
    return request.app.state.proposals  # type: ignore[no-any-return]


StoreDep = Annotated[Store, Depends(get_store)]
LimitsDep = Annotated[WorkLimits, Depends(get_limits)]
JobsDep = Annotated[BackgroundAdjustments, Depends(get_jobs)]
QueueDep = Annotated[AdjustmentQueue, Depends(get_queue)]
ProposalsDep = Annotated[ProposalCache, Depends(get_proposals)]


def project_or_404(project_id: str, store: StoreDep, request: Request) -> Project:
    """The project named in the path, or 404: also when the signed-in account may not see
    it, so that an id never tells whether a project exists."""
    who = access.principal(request)
    # fail closed: only an account that may read (or the workstation) looks projects up
    project = store.get_project(project_id, visible_to=who.viewer) if who.may(access.READ) else None
    if project is None:
        raise HTTPException(status_code=404, detail="There is no project with this id.")
    return project


ProjectDep = Annotated[Project, Depends(project_or_404)]


async def wait_briefly(job: RunJob, seconds: float) -> None:
    """Wait up to ``seconds`` for a background run to end, so that a small one opens straight
    on its results: on a worker thread for this process's jobs; for a worker's job by
    polling the database from the event loop, so that many waiting uploads do not take
    every thread that pages need."""
    if isinstance(job.done, threading.Event):
        await run_in_threadpool(job.done.wait, seconds)
        return
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if await run_in_threadpool(job.done.is_set):
            return
        await asyncio.sleep(POLL_FOR_WORKERS)


def busy(exc: QueueFull) -> HTTPException:
    """503 with Retry-After: the queue of adjustments is full; nothing was stored."""
    waiting = exc.args[0] if exc.args else 0
    return HTTPException(
        status_code=503,
        detail=(
            f"The service is busy: {waiting} adjustments are already waiting their turn. "
            "Nothing was stored or changed; please try again in a minute."
        ),
        headers={"Retry-After": str(RETRY_AFTER_SECONDS)},
    )


def room_in_queue(queue: AdjustmentQueue | BackgroundAdjustments) -> None:
    """Refuse (503) before storing anything when the adjustment queue is full (for a
    stored run, ``jobs``: the workers' queue with PostgreSQL)."""
    try:
        queue.check_room()
    except QueueFull as exc:
        raise busy(exc) from None


def standards_choice(request: Request) -> StandardsChoice:
    """Presets from the query (400 for an unknown one)."""
    try:
        return StandardsChoice.from_query(
            request.query_params.get("relative"), request.query_params.get("misclosure")
        )
    except UnknownPreset as exc:
        raise HTTPException(status_code=400, detail=str(exc)) from None


ChoiceDep = Annotated[StandardsChoice, Depends(standards_choice)]


# --------------------------------------------------------------------------------------
# forms: size limits, the same-origin check and the project's token


async def read_form(request: Request, max_fields: int = _MAX_FORM_FIELDS) -> FormData:
    """A small url-encoded or multipart form with no files."""
    return await request.form(max_files=0, max_fields=max_fields, max_part_size=_MAX_FORM_BYTES)


def today() -> str:
    """The date written beside a decision: today on the server's calendar."""
    return date.today().isoformat()


def form_text(form: FormData, name: str, limit: int = 1000) -> str:
    value = form.get(name)
    return value[:limit] if isinstance(value, str) else ""


def check_form(request: Request, project: Project, form: FormData) -> None:
    """Refuse a state-changing form that another site sent, or that lacks the project's token."""
    if request.headers.get("sec-fetch-site", "") == "cross-site":
        raise HTTPException(status_code=403, detail="This form was sent from another site.")
    origin = request.headers.get("origin")
    host = request.headers.get("host", "")
    if origin and origin != "null" and urlsplit(origin).netloc != host:
        raise HTTPException(status_code=403, detail="This form was sent from another site.")
    token = form_text(form, "token", 100)
    if not project.form_token or not hmac.compare_digest(token, project.form_token):
        raise HTTPException(
            status_code=403,
            detail="This form is out of date or did not come from this page. "
            "Reload the page and try again.",
        )


async def checked_form(request: Request, project: ProjectDep) -> FormData:
    """The project's form, read and checked (see ``check_form``)."""
    form = await read_form(request)
    check_form(request, project, form)
    return form


CheckedForm = Annotated[FormData, Depends(checked_form)]


# --------------------------------------------------------------------------------------
# uploads


_MAX_NAME = 200


def _clean_filename(filename: str | None) -> str:
    """The last path component of a client file name, without control characters."""
    base = re.split(r"[\\/]", filename or "")[-1]
    return "".join(ch for ch in base if ch.isprintable())[:_MAX_NAME]


async def read_upload(request: Request, *, with_text: bool) -> Upload | None:
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


# --------------------------------------------------------------------------------------
# responses


def render(request: Request, name: str, context: dict[str, Any], status: int = 200) -> HTMLResponse:
    templates: Jinja2Templates = request.app.state.templates
    return templates.TemplateResponse(request, name, context, status_code=status)


def download_name(project: Project, suffix: str) -> str:
    """A file name safe for Content-Disposition, from the upload's name."""
    stem = Path(project.filename).stem if project.filename else project.name
    safe = _UNSAFE_FILENAME.sub("_", stem).strip("._-")[:60]
    return f"{safe or 'stationfit'}{suffix}"


def safe_filename(filename: str, fallback: str) -> str:
    """A client's file name made safe for Content-Disposition (fallback when nothing is left)."""
    stem, dot, suffix = filename.rpartition(".")
    if not dot:
        stem, suffix = filename, ""
    safe = _UNSAFE_FILENAME.sub("_", stem).strip("._-")[:60]
    ending = _UNSAFE_FILENAME.sub("", suffix)[:12]
    return f"{safe}.{ending}" if safe and ending else (safe or fallback)


def attachment(content: str | bytes, media_type: str, filename: str) -> Response:
    return Response(
        content,
        media_type=media_type,
        headers={"Content-Disposition": f'attachment; filename="{filename}"'},
    )


def page_number(request: Request, key: str) -> int:
    """A ``?obs_page=`` style number: anything unreadable means page 1, too large the last."""
    raw = request.query_params.get(key, "1").strip()
    if not raw.isdigit() or len(raw) > 7:
        return 1 if not raw.isdigit() else MAX_PAGE_PARAMETER
    return min(int(raw), MAX_PAGE_PARAMETER)


def page_links(
    request: Request, key: str, page: Page | None, anchor: str, path: str
) -> dict[str, str]:
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


def client(request: Request) -> str:
    """The client's address (who acted, on the workstation without accounts)."""
    return request.client.host if request.client is not None else "unknown client"


def acting(request: Request) -> str:
    """Who acted, for the log: the account and its address, or the address alone."""
    who = access.signed_in(request)
    return f"{who.name} from {client(request)}" if who is not None else client(request)


def survey_error_payload(exc: SurveyError) -> dict[str, Any]:
    """The JSON body for an input error: line-numbered ``errors`` or ``error`` with ``points``."""
    record = error_record(exc)
    if isinstance(exc, FieldbookError):
        return {
            "error": record["message"],
            "errors": record["issues"],
            "error_count": record["count"],
        }
    if isinstance(exc, NetworkError):
        return {"error": exc.message, "points": list(exc.points)}
    return {"error": str(exc)}
