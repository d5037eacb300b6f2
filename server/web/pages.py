"""HTML pages: upload, project list, results and the downloads.  The work is in
``server.store.projects``; a route reads the request, calls it and renders."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import (
    HTMLResponse,
    PlainTextResponse,
    RedirectResponse,
    Response,
)
from starlette.concurrency import run_in_threadpool

from server.errors import FieldbookError
from server.fieldbook.model import Fieldbook
from server.formats.geojson import NO_CRS, GeoJsonUnavailable, geojson_text
from server.report import csv_export
from server.report import html as html_report
from server.report import tables as report
from server.report.origin import ApprovalNote, ImportedFrom
from server.report.pdf import report_pdf
from server.report.tables import Page
from server.report.text import report_text
from server.results.result import AdjustmentResult
from server.settings import WorkLimits
from server.store import projects as service
from server.store.projects import StandardsChoice, Upload, display_name
from server.store.sqlite import Project, Run, Store
from server.web import access, approval, imports, run_parts
from server.web import dependencies as deps
from server.web.api import ResultJSONResponse
from server.web.dependencies import (
    CheckedForm,
    ChoiceDep,
    JobsDep,
    ProjectDep,
    QueueDep,
    StoreDep,
    attachment,
    download_name,
    page_links,
    page_number,
    read_upload,
    render,
)
from server.web.design import design_redirect

router = APIRouter()


async def _submit_in_background(request: Request, upload: Upload) -> str:
    """Store and start adjusting; wait briefly so small jobs open straight on their results."""
    store, limits, jobs = deps.get_store(request), deps.get_limits(request), deps.get_jobs(request)
    await run_in_threadpool(deps.room_in_queue, jobs)
    project_id, book, run_id, _ = await run_in_threadpool(
        service.store_upload,
        store,
        upload,
        request.app.state.max_projects,
        limits,
        access.actor(request),
    )
    if book is not None and run_id is not None:
        job = await run_in_threadpool(
            jobs.start, run_id, _adjusting(request, project_id, run_id, book, limits)
        )
        await deps.wait_briefly(job, deps.WAIT_FOR_SMALL_JOBS)
    return project_id


def _adjusting(
    request: Request, project_id: str, run_id: int, book: Fieldbook, limits: WorkLimits
) -> Callable[[Callable[[str, int], None]], None]:
    """The job of a stored run: adjust it, then make its pages' parts for the first view."""
    app, store = request.app, deps.get_store(request)

    def work(progress: Callable[[str, int], None]) -> None:
        service.adjust_run(store, run_id, book, progress, limits)
        run_parts.prepare(app, project_id, run_id)

    return work


async def _import_in_background(request: Request, upload: Upload) -> Response:
    """Import survey XML or a CSV and show its preview; an input error gets a page naming
    the file's line (nothing stored)."""
    store = deps.get_store(request)
    try:
        project_id = await run_in_threadpool(
            imports.store_import,
            store,
            upload,
            request.app.state.max_projects,
            access.actor(request),
        )
    except FieldbookError as exc:
        return import_refused(request, upload.filename, exc)
    return RedirectResponse(f"/projects/{project_id}/import", status_code=303)


def import_refused(request: Request, filename: str, exc: FieldbookError) -> Response:
    """422: the file could not be imported; each problem with its line of that file."""
    kind = "XML" if not filename.lower().endswith(".csv") else "CSV"
    issues = [{"line": i.line, "message": i.message} for i in exc.issues]
    return render(
        request,
        "error.html",
        {
            "status": 422,
            "heading": f"The {kind} file could not be imported",
            "message": (
                f"{filename or 'The pasted text'}: nothing was stored. Correct the file "
                "at the line named below and upload it again."
            ),
            "issues": issues,
            "points": [],
            "line_label": f"{kind} line",
        },
        status=422,
    )


def imported_from(project: Project) -> ImportedFrom | None:
    """The original file of an imported project, as the reports name it."""
    if project.source is None:
        return None
    return ImportedFrom(project.source.filename, project.source.sha256)


def approved(store: Store, project: Project, choice: StandardsChoice) -> ApprovalNote | None:
    """The approval of the run a report is of (the latest), if it was approved for issue.

    A report with accuracy presets chosen afterwards is a new evaluation that the approval
    did not cover: it carries none.
    """
    if choice.presets:
        return None
    run = store.latest_run(project.id)
    return approval.approval_of(store, project.id, run.id if run is not None else None)


def finished_run(
    request: Request, store: Store, project: Project, choice: StandardsChoice, queue: QueueDep
) -> tuple[Run, AdjustmentResult]:
    """The latest run and its result with the chosen presets (made once per run), or 404."""
    run = store.latest_run(project.id)
    result = run_parts.result(request, project, run, choice, queue)
    if run is None or result is None:
        raise HTTPException(status_code=404, detail="This project has no adjustment result.")
    return run, result


def finished_result(
    request: Request, store: Store, project: Project, choice: StandardsChoice, queue: QueueDep
) -> AdjustmentResult:
    """The latest result with the chosen presets (made once per run), or 404."""
    return finished_run(request, store, project, choice, queue)[1]


def _demos(request: Request) -> dict[str, Path]:
    """Demo field books (and survey XML files to import) by name, from the folder's listing."""
    folder: Path = request.app.state.demo_dir
    if not folder.is_dir():
        return {}
    found = sorted(folder.glob("*.fieldbook")) + sorted(folder.glob("*.xml"))
    return {p.stem: p for p in found if p.is_file()}


def _upload_page_context(request: Request, problem: str) -> dict[str, Any]:
    demos = _demos(request)
    return {
        "demos": list(demos),
        "problem": problem,
        "xml_demos": [name for name, path in demos.items() if path.suffix == ".xml"],
        "limit": request.app.state.max_upload_bytes,
    }


def _demo_or_404(request: Request, name: str) -> Path:
    path = _demos(request).get(name)
    if path is None:
        raise HTTPException(status_code=404, detail="There is no demo project of that name.")
    return path


def _results_context(
    request: Request, project: Project, run: Run, result: AdjustmentResult, choice: StandardsChoice
) -> dict[str, Any]:
    """The results page's tables, plot, links and the presets offered."""
    context = report.context(
        result,
        choice.presets,
        obs_page=page_number(request, "obs_page"),
        pt_page=page_number(request, "pt_page"),
        all_observation_rows=run_parts.observation_rows(request, project, run, choice, result),
    )
    here = f"/projects/{project.id}"
    observation_page = context["observation_page"]
    point_page = context["point_page"]
    assert isinstance(observation_page, Page | None) and isinstance(point_page, Page | None)
    context["observation_links"] = page_links(
        request, "obs_page", observation_page, "observations", here
    )
    context["point_links"] = page_links(request, "pt_page", point_page, "points", here)
    context["network_plot_html"] = run_parts.plot_fragment(request, project, run, choice, result)
    context["geojson_unavailable"] = "No GeoJSON: " + NO_CRS[0].lower() + NO_CRS[1:] + "."
    context.update(
        choice=choice, download_query=choice.query, preset_options=service.preset_options()
    )
    return context


# --------------------------------------------------------------------------------------
# pages


@router.get("/", response_class=HTMLResponse)
def upload_page(request: Request) -> HTMLResponse:
    """The upload form and the demo projects."""
    return render(request, "index.html", _upload_page_context(request, ""))


@router.post("/projects")
async def create_project(request: Request) -> Response:
    """Store an uploaded field book, adjust it and show the results; survey XML or a CSV
    of readings is imported and previewed first."""
    upload = await read_upload(request, with_text=True)
    if upload is None:
        return render(
            request,
            "index.html",
            _upload_page_context(
                request, "Choose a field book file or paste its text, then press Adjust."
            ),
            status=400,
        )
    if imports.is_import(upload):
        return await _import_in_background(request, upload)
    project_id = await _submit_in_background(request, upload)
    return RedirectResponse(f"/projects/{project_id}", status_code=303)


@router.get("/projects/{project_id}/import", response_class=HTMLResponse)
def import_page(request: Request, project: ProjectDep, store: StoreDep) -> Response:
    """The produced field book beside the import's summary, before anything is adjusted."""
    if project.source is None or store.runs(project.id):
        return RedirectResponse(f"/projects/{project.id}", status_code=303)
    summary = imports.import_preview(project)
    return render(
        request,
        "import_preview.html",
        {
            "project": project,
            "summary": summary,
            "source": project.source,
            "name": display_name(project.name, project.filename),
            "kind": "CSV" if summary is not None and summary.kind == "csv" else "XML",
        },
    )


@router.post("/projects/{project_id}/adjust")
async def adjust_imported(request: Request, project: ProjectDep, form: CheckedForm) -> Response:
    """Adjust an imported field book once (a second press only opens the project)."""
    store, limits, jobs = deps.get_store(request), deps.get_limits(request), deps.get_jobs(request)
    if not store.runs(project.id):
        await run_in_threadpool(deps.room_in_queue, jobs)
        book, run_id = await run_in_threadpool(
            imports.start_imported_run, store, project, limits, access.actor(request)
        )
        if book is not None and run_id is not None:
            job = await run_in_threadpool(
                jobs.start, run_id, _adjusting(request, project.id, run_id, book, limits)
            )
            await deps.wait_briefly(job, deps.WAIT_FOR_SMALL_JOBS)
    return RedirectResponse(f"/projects/{project.id}", status_code=303)


@router.post("/projects/{project_id}/discard")
async def discard_import(request: Request, project: ProjectDep, form: CheckedForm) -> Response:
    """Go back: an imported project not yet adjusted is deleted (restorable like any other);
    only by whoever may delete it (its owner, or a surveyor in responsible charge)."""
    store = deps.get_store(request)
    if not access.principal(request).may_manage(project):
        raise HTTPException(
            status_code=403,
            detail="Only the project's owner or a surveyor in responsible charge may discard it.",
        )
    if project.source is not None and not store.runs(project.id):
        store.delete_project(project.id, actor=access.actor(request))
    return RedirectResponse("/", status_code=303)


@router.get("/projects", response_class=HTMLResponse)
def project_list(request: Request, store: StoreDep) -> HTMLResponse:
    """Every stored project with its latest verdict."""
    return render(
        request,
        "projects.html",
        {"projects": service.project_list_items(store, access.viewer(request))},
    )


@router.get("/projects/{project_id}", response_class=HTMLResponse)
def project_page(
    request: Request, project: ProjectDep, store: StoreDep, jobs: JobsDep, choice: ChoiceDep
) -> Response:
    """The results of a project's latest adjustment, or what stopped it."""
    runs = store.runs(project.id)
    if project.source is not None and not runs:
        return RedirectResponse(f"/projects/{project.id}/import", status_code=303)
    if not runs:
        redirect = design_redirect(project)
        if redirect is not None:  # a book of planned observations: designed, not adjusted
            return redirect
    newest = runs[-1] if runs else None
    interrupted = None
    if newest is not None and newest.status in ("running", "interrupted"):
        job = jobs.get(newest.id)
        if job is not None and newest.status == "running":
            return render(
                request,
                "progress.html",
                {
                    "project": project,
                    "run": newest,
                    "job": job,
                    "name": display_name(project.name, project.filename),
                },
            )
        interrupted = newest  # the service stopped before this run finished
    run = run_parts.latest_completed(runs)  # read in full only if its result is not kept
    result = run_parts.result(request, project, run, choice, jobs.queue)
    context: dict[str, Any] = {
        **approval.page_context(request, store, project.id),
        "project": project,
        "run": run,
        "error": None,
        "issues": [],
        "interrupted": interrupted,
        "name": display_name(project.name, project.filename, result.title if result else ""),
    }
    if result is not None and run is not None:
        context.update(_results_context(request, project, run, result, choice))
    elif run is not None and run.error is not None:
        context["error"] = run.error
        context["issues"] = service.issues_with_text(project, run.error.get("issues", []))
    return render(request, "results.html", context)


@router.get("/projects/{project_id}/report.html")
def project_report(
    request: Request, choice: ChoiceDep, project: ProjectDep, store: StoreDep, queue: QueueDep
) -> Response:
    """The printable report, as a download; its inline style is allowed by hash only."""
    run, result = finished_run(request, store, project, choice, queue)
    css = html_report.report_css()
    response = attachment(
        html_report.report_html(
            result,
            presets=choice.presets,
            imported_from=imported_from(project),
            # the rows and the plot the results page of this run has made already
            observation_rows=run_parts.observation_rows(request, project, run, choice, result),
            plot_data=run_parts.plot_data(request, project, run, choice, result),
            approval=approved(store, project, choice),
        ),
        "text/html; charset=utf-8",
        download_name(project, "-report.html"),
    )
    response.headers["Content-Security-Policy"] = (
        f"default-src 'none'; style-src {html_report.style_hash(css)}; base-uri 'none'; "
        "form-action 'none'; frame-ancestors 'none'"
    )
    return response


@router.get("/projects/{project_id}/report.pdf")
def project_report_pdf(
    request: Request, choice: ChoiceDep, project: ProjectDep, store: StoreDep, queue: QueueDep
) -> Response:
    """The report as PDF, drawn on the server."""
    result = finished_result(request, store, project, choice, queue)
    return attachment(
        report_pdf(
            result,
            presets=choice.presets,
            imported_from=imported_from(project),
            approval=approved(store, project, choice),
        ),
        "application/pdf",
        download_name(project, "-report.pdf"),
    )


@router.get("/projects/{project_id}/report.txt")
def project_report_text(
    request: Request, choice: ChoiceDep, project: ProjectDep, store: StoreDep, queue: QueueDep
) -> Response:
    """The plain-text summary, as the terminal prints it."""
    result = finished_result(request, store, project, choice, queue)
    return attachment(
        report_text(result, imported_from(project), approved(store, project, choice)),
        "text/plain; charset=utf-8",
        download_name(project, "-report.txt"),
    )


@router.get("/projects/{project_id}/points.csv")
def project_points_csv(
    request: Request, project: ProjectDep, choice: ChoiceDep, store: StoreDep, queue: QueueDep
) -> Response:
    """The adjusted points as CSV."""
    result = finished_result(request, store, project, choice, queue)
    return attachment(
        csv_export.points_csv(result),
        "text/csv; charset=utf-8",
        download_name(project, "-points.csv"),
    )


@router.get("/projects/{project_id}/points.geojson")
def project_geojson(
    request: Request, project: ProjectDep, choice: ChoiceDep, store: StoreDep, queue: QueueDep
) -> Response:
    """Points and observation lines as GeoJSON in longitude and latitude; 409 without a CRS
    (there is nothing RFC 7946 can hold)."""
    result = finished_result(request, store, project, choice, queue)
    try:
        text = geojson_text(result)
    except GeoJsonUnavailable as exc:
        raise HTTPException(409, str(exc)) from None
    return attachment(text, "application/geo+json", download_name(project, ".geojson"))


@router.get("/projects/{project_id}/result.json")
def project_result_json(
    project: ProjectDep, store: StoreDep, request: Request, queue: QueueDep
) -> Response:
    """The contract JSON of the latest finished run; with a preset asked for, adjusted again."""
    run = store.latest_run(project.id)
    if run is None or run.result_json is None:
        raise HTTPException(status_code=404, detail="This project has no adjustment result.")
    choice = deps.standards_choice(request)
    body = run.result_json
    if choice.presets:
        body = finished_result(request, store, project, choice, queue).to_json_dict()
    return ResultJSONResponse(
        body,
        headers={"Content-Disposition": _attachment_header(project, "-result.json")},
    )


@router.get("/projects/{project_id}/fieldbook")
def project_fieldbook(project: ProjectDep) -> Response:
    """The field book exactly as uploaded."""
    return attachment(
        project.fieldbook, "text/plain; charset=utf-8", download_name(project, ".fieldbook")
    )


@router.get("/projects/{project_id}/source")
def project_source(project: ProjectDep) -> Response:
    """The file an imported field book came from, byte for byte (never shown inline)."""
    if project.source is None:
        raise HTTPException(status_code=404, detail="This project was not imported from a file.")
    name = deps.safe_filename(project.source.filename, "source.xml")
    return attachment(project.source.content, "application/octet-stream", name)


@router.get("/demos/{name}")
def demo_text(name: str, request: Request) -> PlainTextResponse:
    """A demo field book as plain text (looked up by name, never by path)."""
    path = _demo_or_404(request, name)
    return PlainTextResponse(path.read_bytes(), headers={"Cache-Control": "no-cache"})


@router.post("/demos/{name}")
async def demo_open(name: str, request: Request) -> Response:
    """Store a demo as a new project, adjust it and show the results."""
    path = _demo_or_404(request, name)
    upload = Upload(data=path.read_bytes(), filename=path.name, name="")
    if path.suffix == ".xml":
        return await _import_in_background(request, upload)
    project_id = await _submit_in_background(request, upload)
    return RedirectResponse(f"/projects/{project_id}", status_code=303)


def _attachment_header(project: Project, suffix: str) -> str:
    """Content-Disposition of a download named after the project."""
    return f'attachment; filename="{download_name(project, suffix)}"'
