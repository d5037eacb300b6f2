"""Approving a run for issue, and sharing a project.

The surveyor in responsible charge approves the run under review: the latest finished run,
with no decision queued after it.  The approval records who, when, which run and the
SHA-256 of the field book it adjusted; from then on the run is frozen (the store refuses any
change to it), decisions made afterwards go into a new run that needs its own approval, and
the run's reports say who approved it.  An approval records a review; it certifies nothing,
and the caution stays on every page and report.

The owner of a project (or a surveyor in responsible charge) shares it with the whole office
or with named accounts; everyone else gets "not found" for it.
"""

from __future__ import annotations

import logging
import re

from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from server.report.origin import ApprovalNote
from server.store.projects import display_name
from server.store.sqlite import Approval, NotApprovable, Store, TrailEntry
from server.web import access
from server.web.dependencies import CheckedForm, ProjectDep, RowId, StoreDep, form_text, render

logger = logging.getLogger("stationfit.web")

router = APIRouter()

#: Accounts a project may be shared with by name, at most.
MAX_SHARES = 100


@router.post("/projects/{project_id}/runs/{run_id}/approve")
async def approve_run(
    request: Request, project: ProjectDep, store: StoreDep, form: CheckedForm, run_id: RowId
) -> Response:
    """Approve the run for issue (409 with the reason when it cannot be)."""
    who = access.principal(request)
    if who.workstation:  # an approval names the surveyor: it needs accounts
        raise HTTPException(403, "Approving a run needs accounts: it names who approved it.")
    if await run_in_threadpool(store.run, project.id, run_id) is None:
        raise HTTPException(404, "This project has no run with this number.")
    try:
        approval = await run_in_threadpool(store.approve_run, project.id, run_id, who.actor)
    except NotApprovable as exc:
        raise HTTPException(409, str(exc)) from None
    logger.info(
        "run #%d of project %s (%r) approved for issue by %s",
        approval.run_number,
        project.id,
        display_name(project.name, project.filename),
        who.name,
    )
    return RedirectResponse(f"/projects/{project.id}/review#approval", status_code=303)


def note(approval: Approval) -> ApprovalNote:
    """What the reports print of an approval."""
    return ApprovalNote(
        approval.approved_by, approval.approved, approval.run_number, approval.fieldbook_sha256
    )


def approval_of(store: Store, project_id: str, run_id: int | None) -> ApprovalNote | None:
    """The approval of one run, as the reports print it (None: not approved)."""
    if run_id is None:
        return None
    found = store.approvals(project_id).get(run_id)
    return None if found is None else note(found)


#: What each trail event says, after who did it.
_EVENT_WORDS = {
    "created": "stored the project",
    "run": "started",
    "proposed": "proposed a decision on",
    "withdrawn": "withdrew the decision on",
    "approved": "approved for issue",
    "deleted": "deleted the project",
    "restored": "restored the project",
    "shared": "shared the project with",
}


def trail_rows(entries: list[TrailEntry]) -> list[dict[str, str]]:
    """The review trail as the pages list it: when, who (and their role), what."""
    from server.store.roles import ROLE_TITLES

    rows = []
    for entry in entries:
        who = entry.actor or "the workstation user"
        role = ROLE_TITLES.get(entry.role, "")
        rows.append(
            {
                "when": entry.created,
                "who": f"{who} ({role})" if entry.actor and role else who,
                "what": f"{_EVENT_WORDS.get(entry.event, entry.event)} {entry.detail}".strip(),
            }
        )
    return rows


def page_context(request: Request, store: Store, project_id: str) -> dict[str, object]:
    """What the approval and trail panels of the project and review pages show."""
    return {
        "approvals": {k: note(v) for k, v in store.approvals(project_id).items()},
        "trail": trail_rows(store.trail(project_id)),
        "shares": store.shares(project_id),
        "who": access.signed_in(request),
    }


_NAMES = re.compile(r"[\s,;]+")


@router.post("/projects/{project_id}/sharing")
async def share_project(
    request: Request, project: ProjectDep, store: StoreDep, form: CheckedForm
) -> Response:
    """Share with the whole office (or not) and with the accounts named (comma-separated)."""
    who = access.principal(request)
    if who.workstation:
        raise HTTPException(403, "Sharing needs accounts: on the workstation there is one user.")
    if not who.may_manage(project):
        raise HTTPException(
            403,
            "Only the project's owner or a surveyor in responsible charge may share it.",
        )
    office = form_text(form, "office", 10) == "1"
    names = [n for n in _NAMES.split(form_text(form, "users", 5000)) if n][:MAX_SHARES]
    unknown = await run_in_threadpool(store.set_sharing, project.id, office, names, by=who.actor)
    if unknown:
        return render(
            request,
            "error.html",
            {
                "status": 422,
                "heading": "Not shared",
                "message": "There is no account named "
                + ", ".join(repr(n[:64]) for n in unknown[:10])
                + ". Nothing was changed; go back and correct the names.",
                "issues": [],
                "points": [],
            },
            status=422,
        )
    return RedirectResponse(f"/projects/{project.id}#sharing", status_code=303)
