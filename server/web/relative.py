"""Asking for the relative precision of point pairs from the results page.

The pairs a surveyor picks become one review decision ("report the relative
precision of these pairs", with a reason and the date), queued like the
others.  The re-run writes them into the field book as ``relative A B``
lines at its end, so they stay with the project, its trail of runs and the
edited field book it hands out; nothing is computed or cached outside a run.
"""

from __future__ import annotations

from itertools import combinations

from fastapi import APIRouter, Request
from fastapi.responses import RedirectResponse, Response
from starlette.concurrency import run_in_threadpool
from starlette.datastructures import FormData

from server.errors import SurveyError
from server.fieldbook.edits import MAX_PAIRS, ObservationEdit, apply_edits, clean_reason
from server.report import review
from server.results.result import AdjustmentResult
from server.store.projects import display_name, load_state
from server.store.sqlite import AlreadyQueued
from server.web import access
from server.web.dependencies import ProjectDep, StoreDep, check_form, read_form, render, today

router = APIRouter()

#: Most points for "all pairs among these points" (20 points give 190 pairs).
MAX_AMONG = 20
# pairs added one by one in the browser, the among list, from, to, reason, token
_MAX_FIELDS = MAX_PAIRS + MAX_AMONG + 10


def pickable_points(result: AdjustmentResult) -> list[str]:
    """Points a pair may name: tied to the survey, with a position (a height in 1D)."""
    vertical = result.summary.dimension == 1
    return [
        p.name
        for p in result.points
        if p.in_use and (p.height is not None if vertical else p.east is not None)
    ]


class PairRequestError(ValueError):
    """The pairs picked cannot be asked for; the message says why."""


def requested_pairs(
    known: list[str], pairs: list[str], first: str, second: str, among: list[str]
) -> list[tuple[str, str]]:
    """The pairs a form asks for, checked, in a stable order and without repeats.

    ``pairs`` are "A B" strings added one by one, ``first``/``second`` the
    from/to selects, ``among`` the points of "all pairs among these points".
    """
    order = {name: k for k, name in enumerate(known)}
    chosen = _typed_pairs(pairs) + _selected_pair(first, second) + _pairs_among(among, order)
    for a, b in chosen:
        for name in (a, b):
            if name not in order:
                raise PairRequestError(f"point {name} is not among the adjusted points")
        if a == b:
            raise PairRequestError(f"the pair {a}–{b} names the same point twice")
    out: list[tuple[str, str]] = []
    seen: set[frozenset[str]] = set()
    for a, b in chosen:
        if frozenset((a, b)) not in seen:
            seen.add(frozenset((a, b)))
            out.append((a, b))
    if not out:
        raise PairRequestError("choose a pair (From and To) or at least two points")
    if len(out) > MAX_PAIRS:
        raise PairRequestError(f"{len(out)} pairs at once is too many; ask for at most {MAX_PAIRS}")
    return out


def _typed_pairs(pairs: list[str]) -> list[tuple[str, str]]:
    """The "A B" strings added one by one."""
    chosen = []
    for text in pairs:
        parts = text.split()
        if len(parts) != 2:
            raise PairRequestError("a pair must name two points")
        chosen.append((parts[0], parts[1]))
    return chosen


def _selected_pair(first: str, second: str) -> list[tuple[str, str]]:
    """The From/To selects: both or neither."""
    if not (first or second):
        return []
    if not (first and second):
        raise PairRequestError("choose both points of the pair, From and To")
    return [(first, second)]


def _pairs_among(among: list[str], order: dict[str, int]) -> list[tuple[str, str]]:
    """All pairs among the chosen points, in the order of the adjusted points."""
    if not among:
        return []
    if len(among) > MAX_AMONG:
        raise PairRequestError(
            f"{len(among)} points chosen for all pairs among them; choose at most {MAX_AMONG}"
        )
    if len(set(among)) < 2:
        raise PairRequestError("choose at least two points for all pairs among them")
    for name in among:
        if name not in order:
            raise PairRequestError(f"point {name} is not among the adjusted points")
    return list(combinations(sorted(set(among), key=order.__getitem__), 2))


def _strings(form: FormData, name: str, limit: int = 200) -> list[str]:
    return [v[:limit] for v in form.getlist(name) if isinstance(v, str) and v.strip()]


@router.post("/projects/{project_id}/relative-pairs")
async def ask_relative_pairs(request: Request, project: ProjectDep, store: StoreDep) -> Response:
    """Queue a decision asking for the relative precision of the pairs picked."""
    form = await read_form(request, max_fields=_MAX_FIELDS)
    check_form(request, project, form)
    state = await run_in_threadpool(load_state, store, project)
    message = ""
    pairs: list[tuple[str, str]] = []
    reason = clean_reason(next(iter(_strings(form, "reason", 1000)), ""))
    if state.result is None:
        message = "This project has no adjusted run to ask about."
    else:
        first = next(iter(_strings(form, "from")), "").strip()
        second = next(iter(_strings(form, "to")), "").strip()
        try:
            pairs = requested_pairs(
                pickable_points(state.result),
                _strings(form, "pair")[: MAX_PAIRS + 1],
                first,
                second,
                _strings(form, "among")[: MAX_AMONG + 1],
            )
        except PairRequestError as exc:
            message = str(exc)
        if not message and not reason:
            message = "give a reason (it is written into the field book beside the pairs)"
    if not message:
        edit = ObservationEdit(
            line=0, action="relative", reason=reason, date=today(), pairs=tuple(pairs)
        )
        try:
            await run_in_threadpool(
                apply_edits,
                project.text,
                [*state.in_force, *state.pending_edits, edit],
                source=project.filename,
            )
        except SurveyError as exc:
            message = str(exc)
    if message:
        return render(
            request,
            "relative_refused.html",
            {
                "project": project,
                "name": display_name(project.name, project.filename),
                "message": message,
            },
            status=422,
        )
    try:
        await run_in_threadpool(
            lambda: store.add_pending_edit(
                project.id, review.edit_to_json(edit), by=access.actor(request)
            )
        )
    except AlreadyQueued as exc:
        return render(
            request,
            "relative_refused.html",
            {
                "project": project,
                "name": display_name(project.name, project.filename),
                "message": str(exc),
            },
            status=409,
        )
    return RedirectResponse(f"/projects/{project.id}/review#decisions", status_code=303)
