"""Routes of the blunder review: decide, re-run, compare, download the edited field book, delete.

The review works on the project's latest finished run.  Decisions are queued
(stored, so closing the browser loses nothing) until the surveyor re-runs;
a re-run applies every decision in force plus the queued ones to the
original upload, is stored as ``running`` first and finished in one
transaction, which refuses it when the queue changed meanwhile (a decision
undone or added by another client), so a re-run never applies a decision the
surveyor was told is withdrawn.  Queuing a decision checks for the same
decision already queued in the transaction that inserts it.  Every form that
changes something carries the project's form token and is refused when the
browser says it came from another site.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable
from typing import Any
from urllib.parse import urlencode

from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from server.errors import SurveyError
from server.fieldbook.edits import (
    ObservationEdit,
)
from server.fieldbook.parser import parse_fieldbook
from server.report import review
from server.report import tables as report
from server.report.tables import ARCSEC, columns, fmt_ratio, length_label, verdict
from server.results.result import AdjustmentResult
from server.review.robust import HUBER_K, RobustResult, robust_adjustment
from server.review.snooping import SnoopingPlan, propose_snooping
from server.review.tau import tau_test
from server.store import projects as service
from server.store.projects import ReviewState, display_name
from server.store.projects import load_state as _load_state
from server.store.sqlite import AlreadyQueued, DecisionsChanged, Project, Run, is_valid_id
from server.web import access, approval, run_parts
from server.web.dependencies import (
    CheckedForm,
    ProjectDep,
    RowId,
    StoreDep,
    acting,
    attachment,
    check_form,
    download_name,
    get_proposals,
    page_links,
    page_number,
    read_form,
    today,
)
from server.web.dependencies import (
    form_text as _text,
)
from server.web.dependencies import (
    get_store as _store,
)
from server.web.dependencies import (
    render as _render,
)

router = APIRouter()

_MAX_REJECTED = 20

logger = logging.getLogger("stationfit.web")


def _int(value: str) -> int | None:
    text = value.strip()
    return int(text) if text.isdigit() and len(text) <= 9 else None


def _rejected(values: list[str]) -> list[int]:
    """Snooping steps the user turned down (by line), from the query or a form."""
    lines = [n for n in (_int(v) for v in values[:_MAX_REJECTED]) if n is not None]
    return sorted(set(lines))


def _review_url(
    project_id: str,
    *,
    suggest: bool = False,
    rejected: list[int] | None = None,
    anchor: str = "",
    page: int = 1,
) -> str:
    """The review page's address, built from checked values only (never echoed from a request)."""
    query: list[tuple[str, str]] = [("obs_page", str(page))] if page > 1 else []
    if suggest:
        query.append(("suggest", "1"))
        query += [("reject", str(line)) for line in rejected or []]
    url = f"/projects/{project_id}/review"
    if query:
        url += "?" + urlencode(query)
    return url + (f"#{anchor}" if anchor else "")


def _proposal(
    request: Request, state: ReviewState, kind: str, propose: Callable[..., Any], failure: str
) -> Any:
    """A proposal computed from the reviewed run's field book, cached per run."""
    assert state.base is not None and state.result is not None
    result = state.result

    def compute() -> Any:
        try:
            fieldbook = parse_fieldbook(state.text, source=state.project.filename)
            return propose(fieldbook, first=result)
        except SurveyError as exc:
            return f"{failure}: {exc}"

    return get_proposals(request).get((kind, state.base.id), compute)


def _robust(request: Request, state: ReviewState) -> RobustResult | str:
    """The robust second opinion, or why it could not be computed."""
    found = _proposal(
        request, state, "robust", robust_adjustment, "The robust adjustment could not be computed"
    )
    assert isinstance(found, RobustResult | str)
    return found


def _snooping(request: Request, state: ReviewState) -> SnoopingPlan | str:
    """The proposed snooping sequence, or why none could be proposed."""
    found = _proposal(request, state, "snooping", propose_snooping, "No sequence could be proposed")
    assert isinstance(found, SnoopingPlan | str)
    return found


def _page_of(result: AdjustmentResult | None, line: int) -> int:
    """The review page that lists ``line`` (page 1 when there is no such observation)."""
    if result is None:
        return 1
    order = [o.line for o in review.review_order(result)]
    return order.index(line) // report.PAGE_SIZE + 1 if line in order else 1


def _review_context(
    request: Request,
    state: ReviewState,
    *,
    suggest: bool = False,
    rejected: list[int] | None = None,
    errors: dict[int, str] | None = None,
    values: dict[int, dict[str, str]] | None = None,
    problem: str = "",
    runs: list[Run] | None = None,
) -> dict[str, Any]:
    """Everything the review page lays out (``runs``: the project's, when read already)."""
    store = _store(request)
    project, result = state.project, state.result
    if runs is None:
        runs = store.runs(project.id)
    latest = run_parts.latest_completed(runs)  # its status, number and error are shown
    context: dict[str, Any] = {
        "project": project,
        "name": display_name(project.name, project.filename, result.title if result else ""),
        "base": state.base,
        "result": result,
        "latest": latest,
        "interrupted": [r for r in runs if r.status in ("running", "interrupted")],
        "finished_runs": sum(1 for r in runs if r.finished),
        "problems": state.problems + ([problem] if problem else []),
        "errors": errors or {},
        "values": values or {},
        "suggest": suggest,
        "rejected": rejected or [],
        "token": project.form_token,
        "in_force": review.decision_rows(state.in_force, result),
        "pending": review.decision_rows(state.pending_edits, result, [p.id for p in state.pending]),
        **approval.page_context(request, store, project.id),
    }
    if result is None:
        return context
    tau = tau_test(result)
    # a refused decision is drawn on the page of its line, so its message sits beside it
    wanted = (
        _page_of(result, next(iter(errors)))
        if errors and "obs_page" not in request.query_params
        else page_number(request, "obs_page")
    )
    page = report.page(len(result.observations), wanted)
    rows = run_parts.review_rows(request, state, tau, page)
    shown = {row.line for row in rows}
    context["problems"] += [
        message for line, message in (errors or {}).items() if line not in shown
    ]
    pending_by_line: dict[int, list[review.DecisionRow]] = {}
    for row in context["pending"]:
        pending_by_line.setdefault(row.line, []).append(row)
    context.update(
        {
            "verdict": verdict(result),
            "rows": rows,
            "observation_page": page,
            # a form's answer is drawn at its own address: the links go back to the review page
            "observation_links": page_links(
                request, "obs_page", page, "observations", f"/projects/{project.id}/review"
            ),
            "pending_by_line": pending_by_line,
            "ignored_after": review.ignored_after(result, state.pending_edits),
            "critical_w": fmt_ratio(result.summary.critical_w),
            "tau": tau,
            "tau_critical": fmt_ratio(tau.critical) if tau else "",
            "tau_rows": review.tau_rows(tau, result) if tau else [],
            "huber_k": f"{HUBER_K:g}",
            "arcsec": ARCSEC,
            "cols": columns(result),
            "length_unit": length_label(result.length_unit),
        }
    )
    context["robust_applies"] = result.summary.redundancy > 0
    robust = _robust(request, state) if context["robust_applies"] else ""
    if isinstance(robust, str):
        context.update(robust=None, robust_problem=robust, robust_rows=[], robust_suspects=[])
    else:
        context.update(
            robust=robust,
            robust_problem="",
            robust_rows=review.robust_rows(robust, result),
            robust_suspects=list(robust.suspects),
        )
    context.update(plan=None, plan_problem="", plan_items=[])
    if suggest:
        plan = _snooping(request, state)
        if isinstance(plan, str):
            context["plan_problem"] = plan
        else:
            context["plan"] = plan
            context["plan_items"] = _plan_items(
                project.id, review.snooping_rows(plan), state.pending_edits, rejected or []
            )
    return context


def _plan_items(
    project_id: str,
    rows: list[review.SnoopingRow],
    pending: list[ObservationEdit],
    rejected: list[int],
) -> list[dict[str, Any]]:
    """Each proposed step with its state: open, queued (accepted), rejected, or blocked."""
    queued = {e.line for e in pending if e.action == "exclude"}
    items = []
    blocked_by: int | None = None
    for row in rows:
        if row.line in queued:
            state = "queued"
        elif row.line in rejected:
            state = "rejected"
        elif blocked_by is not None:
            state = "blocked"
        else:
            state = "open"
        items.append(
            {
                "row": row,
                "state": state,
                "blocked_by": blocked_by,
                "reject_url": _review_url(
                    project_id,
                    suggest=True,
                    rejected=[*rejected, row.line],
                    anchor=f"step-{row.step}",
                ),
                "reconsider_url": _review_url(
                    project_id,
                    suggest=True,
                    rejected=[n for n in rejected if n != row.line],
                    anchor=f"step-{row.step}",
                ),
            }
        )
        if state == "rejected" and blocked_by is None:
            blocked_by = row.step
    return items


# --------------------------------------------------------------------------------------
# pages


@router.get("/projects/{project_id}/review", response_class=HTMLResponse)
def review_page(request: Request, project: ProjectDep, store: StoreDep) -> HTMLResponse:
    """The observations to look at first, the decisions queued, and the second opinions."""
    runs = store.runs(project.id)
    state = run_parts.review_state(request, store, project, runs)
    suggest = request.query_params.get("suggest") == "1"
    rejected = _rejected(request.query_params.getlist("reject"))
    context = _review_context(request, state, suggest=suggest, rejected=rejected, runs=runs)
    return _render(request, "review.html", context)


@router.post("/projects/{project_id}/edits")
async def queue_edit(
    request: Request, project: ProjectDep, store: StoreDep, form: CheckedForm
) -> Response:
    """Queue one decision after checking it reads; a refusal is shown beside its observation."""
    suggest = _text(form, "back", 20) == "suggest"
    rejected = _rejected([v for v in form.getlist("reject") if isinstance(v, str)])
    line = _int(_text(form, "line", 20))
    if line is None:
        raise HTTPException(status_code=400, detail="The decision does not name a line.")
    action = _text(form, "action", 20)
    values = {
        "action": action,
        "reason": _text(form, "reason", 1000),
        "sd": _text(form, "sd", 200).strip(),
        "value": _text(form, "value", 200).strip(),
    }
    state = await run_in_threadpool(_load_state, store, project)
    edit, message = await run_in_threadpool(service.prepare_decision, state, line, values, today())
    status = 422
    if not message:
        try:  # checked again and inserted in one transaction: another client may be deciding
            await run_in_threadpool(
                lambda: store.add_pending_edit(
                    project.id,
                    review.edit_to_json(edit),
                    based_on=state.base.id if state.base else None,
                    by=access.actor(request),
                )
            )
        except (AlreadyQueued, DecisionsChanged) as exc:
            message, status = str(exc), 409
            state = await run_in_threadpool(_load_state, store, project)
    if message:
        context = await run_in_threadpool(
            lambda: _review_context(
                request,
                state,
                suggest=suggest,
                rejected=rejected,
                errors={line: message},
                values={line: values},
            )
        )
        return _render(request, "review.html", context, status=status)
    anchor = "snooping" if suggest else f"line-{line}"
    page = 1 if suggest else _page_of(state.result, line)
    return RedirectResponse(
        _review_url(project.id, suggest=suggest, rejected=rejected, anchor=anchor, page=page),
        status_code=303,
    )


@router.post("/projects/{project_id}/edits/{edit_id}/undo")
async def undo_edit(
    request: Request, project: ProjectDep, store: StoreDep, form: CheckedForm, edit_id: RowId
) -> Response:
    """Withdraw a queued decision."""
    suggest = _text(form, "back", 20) == "suggest"
    rejected = _rejected([v for v in form.getlist("reject") if isinstance(v, str)])
    who = access.principal(request)
    # a technician withdraws their own proposals; deciding on others' is the surveyor's
    only_by = None if who.may(access.DECIDE) else who.name
    if only_by is not None:
        queued = await run_in_threadpool(store.pending_edits, project.id)
        mine = {p.id for p in queued if (p.proposed_by or "").lower() == only_by.lower()}
        if edit_id in {p.id for p in queued} - mine:
            raise HTTPException(
                status_code=403,
                detail="Only whoever proposed this decision, or the surveyor in responsible "
                "charge, may withdraw it.",
            )
    if not await run_in_threadpool(
        lambda: store.remove_pending_edit(project.id, edit_id, by=who.actor, only_by=only_by)
    ):
        # another client's re-run applied it, or it was already withdrawn: never say "done"
        state = await run_in_threadpool(_load_state, store, project)
        problem = (
            "This decision is no longer queued: a re-run has already applied it, or it "
            "was withdrawn. The decisions in force are listed below; to reverse one, "
            "make a new decision on its line."
        )
        context = await run_in_threadpool(
            lambda: _review_context(
                request, state, suggest=suggest, rejected=rejected, problem=problem
            )
        )
        return _render(request, "review.html", context, status=409)
    return RedirectResponse(
        _review_url(project.id, suggest=suggest, rejected=rejected, anchor="decisions"),
        status_code=303,
    )


@router.post("/projects/{project_id}/runs")
async def rerun(
    request: Request, project: ProjectDep, store: StoreDep, form: CheckedForm
) -> Response:
    """Re-run with the decisions, then show what changed."""
    state = await run_in_threadpool(_load_state, store, project)
    if state.base is None or not state.pending:
        return RedirectResponse(_review_url(project.id), status_code=303)
    status = 422
    try:
        run_id, problem = await run_in_threadpool(
            service.rerun, store, state, access.actor(request)
        )
    except DecisionsChanged as exc:  # another client undid or queued a decision meanwhile
        run_id, problem, status = None, str(exc), 409
        state = await run_in_threadpool(_load_state, store, project)
    if problem:
        context = await run_in_threadpool(lambda: _review_context(request, state, problem=problem))
        return _render(request, "review.html", context, status=status)
    new = store.run(project.id, run_id) if run_id is not None else None
    if new is None or not new.finished or state.base is None:
        return RedirectResponse(_review_url(project.id), status_code=303)
    # the results and review pages of the new run are made while the comparison is read
    threading.Thread(
        target=run_parts.prepare, args=(request.app, project.id, new.id), daemon=True
    ).start()
    return RedirectResponse(
        f"/projects/{project.id}/compare?a={state.base.id}&b={new.id}", status_code=303
    )


@router.get("/projects/{project_id}/compare", response_class=HTMLResponse)
def compare_page(request: Request, project: ProjectDep, store: StoreDep) -> HTMLResponse:
    """Two runs side by side: variance factor, global test, flags, point shifts."""
    try:
        context = service.compare_runs(
            store, project, request.query_params.get("a"), request.query_params.get("b")
        )
    except service.NoSuchRun as exc:
        raise HTTPException(status_code=404, detail=str(exc)) from None
    return _render(request, "compare.html", context)


@router.get("/projects/{project_id}/fieldbook/edited")
def edited_fieldbook(project: ProjectDep, store: StoreDep) -> Response:
    """The upload with the decisions in force written into their lines (the original is kept)."""
    return attachment(
        service.edited_fieldbook(store, project),
        "text/plain; charset=utf-8",
        download_name(project, "-edited.fieldbook"),
    )


# --------------------------------------------------------------------------------------
# deleting a project: a confirmation page, then the deletion


@router.post("/projects/{project_id}/confirm-delete", response_class=HTMLResponse)
def confirm_delete(request: Request, project: ProjectDep, store: StoreDep) -> HTMLResponse:
    """Ask before deleting: what will be lost, with the download of the field book."""
    _may_manage(request, project)
    runs = store.runs(project.id)
    return _render(
        request,
        "confirm_delete.html",
        {
            "project": project,
            "name": display_name(project.name, project.filename),
            "runs": len(runs),
            "pending": len(store.pending_edits(project.id)),
            "token": project.form_token,
            "keep_days": request.app.state.keep_deleted_days,
        },
    )


@router.post("/projects/{project_id}/delete")
async def delete_project(
    request: Request, project: ProjectDep, store: StoreDep, form: CheckedForm
) -> Response:
    """Move the project to the recently deleted ones (or erase it when none are kept)."""
    _may_manage(request, project)
    store.delete_project(project.id, actor=access.actor(request))
    logger.info(
        "project %s (%r) deleted by %s",
        project.id,
        display_name(project.name, project.filename),
        acting(request),
    )
    keep_days = request.app.state.keep_deleted_days
    if keep_days == 0:
        service.purge_deleted(store, 0, who=acting(request))
    return RedirectResponse("/projects", status_code=303)


def _may_manage(request: Request, project: Project) -> None:
    """403 unless the account may delete or restore this project (a technician: their own)."""
    if not access.principal(request).may_manage(project):
        raise HTTPException(
            status_code=403,
            detail="Only the project's owner or a surveyor in responsible charge may delete "
            "or restore it.",
        )


@router.get("/deleted-projects", response_class=HTMLResponse)
def deleted_projects(request: Request, store: StoreDep) -> HTMLResponse:
    """The projects deleted within the retention time, each with a Restore button."""
    return _render(
        request,
        "deleted_projects.html",
        {
            "projects": [
                (p, display_name(p.name, p.filename))
                for p in store.deleted_projects(access.viewer(request))
            ],
            "keep_days": request.app.state.keep_deleted_days,
        },
    )


@router.post("/deleted-projects/{project_id}/restore")
async def restore_project(request: Request, project_id: str, store: StoreDep) -> Response:
    """Bring a deleted project back with its runs and queued decisions."""
    viewer = access.viewer(request)
    project = (
        store.get_project(project_id, deleted=True, visible_to=viewer)
        if is_valid_id(project_id)
        else None
    )
    if project is None:
        raise HTTPException(status_code=404, detail="No recently deleted project has this id.")
    form = await read_form(request)
    check_form(request, project, form)
    _may_manage(request, project)
    store.restore_project(project.id, actor=access.actor(request))
    logger.info(
        "project %s (%r) restored by %s",
        project.id,
        display_name(project.name, project.filename),
        acting(request),
    )
    return RedirectResponse(f"/projects/{project.id}", status_code=303)
