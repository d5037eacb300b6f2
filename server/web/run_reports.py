"""The reports of one run by its number, so that an approved run's reports stay at hand after
later runs: the same HTML, PDF and text reports as the project's latest, of the run as stored
(its own decisions and tolerances), with its approval when it was approved for issue."""

from __future__ import annotations

from fastapi import APIRouter, HTTPException
from fastapi.responses import Response

from server.report import html as html_report
from server.report.pdf import report_pdf
from server.report.text import report_text
from server.results.result import AdjustmentResult
from server.store import projects as service
from server.store.sqlite import Project, Store
from server.web.approval import approval_of
from server.web.dependencies import ProjectDep, RowId, StoreDep, attachment, download_name
from server.web.pages import imported_from

router = APIRouter()


def _run_result(store: Store, project: Project, run_id: int) -> AdjustmentResult:
    """The stored result of a finished run of this project, or 404."""
    run = store.run(project.id, run_id)
    if run is None or not run.finished:
        raise HTTPException(404, "This project has no finished run with this number.")
    return service.run_result(project, run)


def _name(store: Store, project: Project, run_id: int, suffix: str) -> str:
    run = store.run(project.id, run_id)
    number = run.number if run is not None else 0
    return download_name(project, f"-run{number}-report{suffix}")


@router.get("/projects/{project_id}/runs/{run_id}/report.html")
def run_report_html(project: ProjectDep, store: StoreDep, run_id: RowId) -> Response:
    """One run's printable report (its inline style allowed by hash only)."""
    result = _run_result(store, project, run_id)
    response = attachment(
        html_report.report_html(
            result,
            imported_from=imported_from(project),
            approval=approval_of(store, project.id, run_id),
        ),
        "text/html; charset=utf-8",
        _name(store, project, run_id, ".html"),
    )
    response.headers["Content-Security-Policy"] = (
        f"default-src 'none'; style-src {html_report.style_hash(html_report.report_css())}; "
        "base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
    )
    return response


@router.get("/projects/{project_id}/runs/{run_id}/report.pdf")
def run_report_pdf(project: ProjectDep, store: StoreDep, run_id: RowId) -> Response:
    """One run's report as PDF."""
    result = _run_result(store, project, run_id)
    return attachment(
        report_pdf(
            result,
            imported_from=imported_from(project),
            approval=approval_of(store, project.id, run_id),
        ),
        "application/pdf",
        _name(store, project, run_id, ".pdf"),
    )


@router.get("/projects/{project_id}/runs/{run_id}/report.txt")
def run_report_text(project: ProjectDep, store: StoreDep, run_id: RowId) -> Response:
    """One run's plain-text summary."""
    result = _run_result(store, project, run_id)
    return attachment(
        report_text(result, imported_from(project), approval_of(store, project.id, run_id)),
        "text/plain; charset=utf-8",
        _name(store, project, run_id, ".txt"),
    )
