"""The design page of a project whose book has planned observations, its JSON figures and its
reports.  Switching observations off is a query (``?off=12,15``), never stored: a design
is explored, not decided; the checkboxes work without script through the form too."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, JSONResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from server.errors import SurveyError
from server.report.design_html import design_html
from server.report.design_pdf import design_pdf
from server.report.design_tables import design_context, design_figures, planned_note
from server.report.html import report_css, style_hash
from server.results.result import AdjustmentResult
from server.store.designs import ParsedBooks, design_of, parse_lines
from server.store.projects import display_name
from server.store.sqlite import Project
from server.web.dependencies import (
    LimitsDep,
    ProjectDep,
    attachment,
    download_name,
    render,
    survey_error_payload,
)

router = APIRouter()
_books = ParsedBooks()


def switched_off(request: Request, project: Project) -> frozenset[int]:
    """The lines left out: ``off=12,15``, or from the form (``form=1`` and an ``on`` per
    checked line: every planned line not checked is off)."""
    query = request.query_params
    if query.get("form") == "1":
        on = parse_lines(",".join(query.getlist("on")))
        lines = {o.line for o in _books.book(project).observations}
        return frozenset(lines - on)
    return parse_lines(query.get("off", ""))


def _design(project: Project, off: frozenset[int], limits: LimitsDep) -> AdjustmentResult:
    return design_of(_books, project, off, limits)


@router.get("/projects/{project_id}/design", response_class=HTMLResponse)
async def design_page(request: Request, project: ProjectDep, limits: LimitsDep) -> Response:
    """The planned observations with a switch each, and the figures of the design."""
    context: dict[str, Any] = {
        "project": project,
        "error": None,
        "name": display_name(project.name, project.filename),
    }
    try:
        off = await run_in_threadpool(switched_off, request, project)
        result = await run_in_threadpool(_design, project, off, limits)
    except SurveyError as exc:
        context["error"] = survey_error_payload(exc)
        context["off_query"] = ""
        return render(request, "design.html", context, status=422)
    context.update(design_context(result))
    context["notes"] = {o.line: planned_note(o) for o in context["planned"]}
    context["off_query"] = ",".join(str(line) for line in sorted(off))
    return render(request, "design.html", context)


@router.get("/projects/{project_id}/design.json")
async def design_json(request: Request, project: ProjectDep, limits: LimitsDep) -> JSONResponse:
    """The figures with ``off`` lines switched off, formatted; 422 with the reason if the
    network cannot be designed that way (a point no longer determined, say)."""
    off = parse_lines(request.query_params.get("off", ""))
    try:
        result = await run_in_threadpool(_design, project, off, limits)
    except SurveyError as exc:
        return JSONResponse(survey_error_payload(exc), status_code=422)
    return JSONResponse(design_figures(result))


@router.get("/projects/{project_id}/design.html")
async def design_report(request: Request, project: ProjectDep, limits: LimitsDep) -> Response:
    """The design report as a download (switched-off lines as on the page)."""
    off = parse_lines(request.query_params.get("off", ""))
    result = await run_in_threadpool(_design, project, off, limits)
    response = attachment(
        design_html(result), "text/html; charset=utf-8", download_name(project, "-design.html")
    )
    # as the adjustment report: its one inline style allowed by hash, nothing else
    response.headers["Content-Security-Policy"] = (
        f"default-src 'none'; style-src {style_hash(report_css())}; base-uri 'none'; "
        "form-action 'none'; frame-ancestors 'none'"
    )
    return response


@router.get("/projects/{project_id}/design.pdf")
async def design_report_pdf(request: Request, project: ProjectDep, limits: LimitsDep) -> Response:
    """The design report as PDF."""
    off = parse_lines(request.query_params.get("off", ""))
    result = await run_in_threadpool(_design, project, off, limits)
    return attachment(design_pdf(result), "application/pdf", download_name(project, "-design.pdf"))


def design_redirect(project: Project) -> RedirectResponse | None:
    """To the design page when the project's book is a design, else None."""
    from server.store.designs import is_design

    try:
        book = _books.book(project)
    except SurveyError:
        return None
    return (
        RedirectResponse(f"/projects/{project.id}/design", status_code=303)
        if is_design(book)
        else None
    )
