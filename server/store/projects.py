"""The project service: what the web routes do to projects, over the SQLite store.

Create a project from an upload and adjust it, list projects with their verdicts,
adjust again with accuracy presets, load the state of a review, re-run with the
decisions, retry an interrupted run, purge deleted projects.  No HTTP here: the
routes turn the exceptions below into answers (``StoreFull`` 507, ``QueueFull`` 503,
``None`` for "no result" 404).
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import re
import threading
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, Protocol

from server.errors import SurveyError
from server.fieldbook.edits import (
    ACTIONS,
    MAX_VALUE_CHARS,
    EditError,
    ObservationEdit,
    apply_edits,
    booked_value,
    clean_reason,
)
from server.fieldbook.model import Fieldbook
from server.fieldbook.parser import parse_fieldbook
from server.pipeline import UNLIMITED, adjust_fieldbook, adjust_parsed, check_observation_limit
from server.report import review
from server.report.tables import verdict_state
from server.results.result import AdjustmentResult
from server.review.standards import PRESETS, Preset, with_presets
from server.settings import WorkLimits
from server.store.designs import is_design
from server.store.sqlite import NO_EDITS, Actor, Approval, PendingEdit, Project, Run, Store

logger = logging.getLogger("stationfit.web")

_LINE_BREAK = re.compile(r"\r\n|\r|\n")


class Slots(Protocol):
    """The adjustment queue as this module uses it (``server.web.jobs.AdjustmentQueue``)."""

    def slot(
        self, ticket: object | None = None, *, bounded: bool = True
    ) -> contextlib.AbstractContextManager[None]: ...


class StoreFull(RuntimeError):
    """The store holds as many projects as it may; the message says what to do."""


@dataclass(frozen=True, slots=True)
class Upload:
    """A field book as received: raw bytes, the client's file name and an optional project name."""

    data: bytes
    filename: str
    name: str


def display_name(name: str, filename: str, title: str = "") -> str:
    """What a project is called on the pages."""
    return name or title or filename or "Untitled field book"


# --------------------------------------------------------------------------------------
# creating and adjusting


def check_room(store: Store, max_projects: int) -> None:
    """Refuse a new project once the store holds ``max_projects`` of them (0: no limit)."""
    if max_projects and len(store.list_projects()) >= max_projects:
        raise StoreFull(
            f"The project store is full ({max_projects} projects). Ask the "
            "administrator to archive the data folder and delete old projects, or "
            "to raise STATIONFIT_MAX_PROJECTS."
        )


def store_upload(
    store: Store,
    upload: Upload,
    max_projects: int = 0,
    limits: WorkLimits = UNLIMITED,
    owner: Actor | None = None,
) -> tuple[str, Fieldbook | None, int | None, SurveyError | None]:
    """Store the upload and open its run; a field book that does not read gets a failed run.

    A field book with more observations than ``limits`` allow raises ``FieldbookError``
    and is not stored: it could never be adjusted here, and keeping it fills the store.
    """
    source = upload.filename or "pasted.fieldbook"
    check_room(store, max_projects)
    try:
        book = parse_fieldbook(upload.data, source=source)
    except SurveyError as exc:
        project_id = store.create_project(upload.name, upload.filename, upload.data, owner=owner)
        store.add_run(project_id, error=exc, by=owner)
        return project_id, None, None, exc
    check_observation_limit(book, limits)
    project_id = store.create_project(
        upload.name or book.title, upload.filename, upload.data, owner=owner
    )
    if is_design(book):  # planned observations: designed on its own page, no run
        return project_id, book, None, None
    return project_id, book, store.start_run(project_id, NO_EDITS, by=owner), None


def adjust_run(
    store: Store,
    run_id: int,
    book: Fieldbook,
    progress: Callable[[str, int], None] | None = None,
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


def adjust_stored_run(
    store: Store,
    run_id: int,
    progress: Callable[[str, int], None] | None = None,
    limits: WorkLimits = UNLIMITED,
) -> str:
    """Adjust a run stored as ``running`` from what is stored, and finish it; what happened.

    What an adjustment worker does with a job: the project's field book with the run's
    decisions written in, or, for a retry of an interrupted run (``retry_of`` in its
    settings), ``retry_interrupted``.  A run that is no longer running is left alone
    (another attempt ended it); ``RunEnded`` when one ends it while this one adjusts,
    ``RunGone`` when its project was deleted meanwhile.
    """
    found = store.run_status(run_id)
    if found is None:
        return "no such run (its project was erased)"
    project_id, status = found
    if status != "running":
        return f"already {status}; nothing to do"
    project = store.get_project(project_id)
    run = store.run(project_id, run_id)
    if project is None or run is None:  # deleted: finish_run drops the run, RunGone
        store.finish_run(run_id, error="the project was deleted")
        return "dropped"
    report = progress or (lambda stage, step: None)
    retry_of = (run.settings or {}).get("retry_of")
    interrupted = store.run(project_id, retry_of) if isinstance(retry_of, int) else None
    if interrupted is not None:
        retry_interrupted(store, project, interrupted, report, run_id)
    else:
        source = project.filename or "pasted.fieldbook"
        try:
            edits = review.edits_from_json(run.edits)
            text = apply_edits(project.text, edits, source=source) if edits else project.fieldbook
            book = parse_fieldbook(text, source=source)
        except SurveyError as exc:
            store.finish_run(run_id, error=exc)
            return "failed: the field book does not read"
        adjust_run(store, run_id, book, progress, limits)
    ended = store.run_status(run_id)
    return "ended " + (ended[1] if ended else "(gone)")


def submit(
    store: Store,
    upload: Upload,
    max_projects: int = 0,
    limits: WorkLimits = UNLIMITED,
    queue: Slots | None = None,
    owner: Actor | None = None,
) -> tuple[str, AdjustmentResult | None, SurveyError | None]:
    """Store the upload, then adjust it as a run marked ``running`` until it ends.

    The field book is kept even when it cannot be read.  A crash or kill during the
    adjustment leaves the project stored and its run marked ``running`` (never
    finished, never shown as a result); the runs before it are untouched.
    With a ``queue``, the adjustment waits for a slot (the run is stored meanwhile).
    """
    project_id, book, run_id, error = store_upload(store, upload, max_projects, limits, owner)
    if book is None or run_id is None:
        return project_id, None, error
    with queue.slot(bounded=False) if queue is not None else contextlib.nullcontext():
        result, error = adjust_run(store, run_id, book, limits=limits)
    return project_id, result, error


def adjust_upload(upload: Upload, limits: WorkLimits, queue: Slots) -> AdjustmentResult:
    """Adjust without storing, once a slot in ``queue`` is free."""
    with queue.slot():
        return adjust_fieldbook(
            upload.data, source=upload.filename or "upload.fieldbook", limits=limits
        )


# --------------------------------------------------------------------------------------
# results, with accuracy presets


def result_of(project: Project, run: Run | None) -> AdjustmentResult | None:
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


class UnknownPreset(ValueError):
    """A preset asked for that does not exist or is of the other kind; the message lists them."""


@dataclass(frozen=True, slots=True)
class StandardsChoice:
    """The presets asked for with ``?relative=…&misclosure=…`` (None: the field book's own)."""

    relative: str | None = None
    misclosure: str | None = None

    @classmethod
    def from_query(cls, relative: str | None, misclosure: str | None) -> StandardsChoice:
        """Check the keys; a missing or empty value keeps the field book's own tolerance."""
        chosen: dict[str, str | None] = {}
        for kind, key in (("relative", relative or None), ("misclosure", misclosure or None)):
            if key is not None and (key not in PRESETS or PRESETS[key].kind != kind):
                choices = ", ".join(k for k, p in PRESETS.items() if p.kind == kind)
                raise UnknownPreset(
                    f"There is no {kind} preset '{key[:60]}'. Choose one of "
                    f"{choices}, or leave it empty for the field book's own."
                )
            chosen[kind] = key
        return cls(**chosen)

    @property
    def presets(self) -> list[Preset]:
        """The chosen presets, relative first."""
        return [PRESETS[key] for key in (self.relative, self.misclosure) if key is not None]

    @property
    def query(self) -> str:
        """The query string that carries the choice to the downloads ("" for none)."""
        parts = [
            f"{name}={key}"
            for name, key in (("relative", self.relative), ("misclosure", self.misclosure))
            if key
        ]
        return "?" + "&".join(parts) if parts else ""


def preset_options() -> dict[str, list[Preset]]:
    """The presets offered on the results page, by kind."""
    return {
        kind: [p for p in PRESETS.values() if p.kind == kind] for kind in ("relative", "misclosure")
    }


def result_with_presets(
    project: Project, run: Run | None, choice: StandardsChoice, queue: Slots | None = None
) -> AdjustmentResult | None:
    """The latest run adjusted again with the chosen presets as its tolerances (decisions kept).

    That adjustment waits for a slot in ``queue`` like any other (``QueueFull`` when full).
    """
    if not choice.presets:
        return result_of(project, run)
    if run is None or not run.finished:
        return None
    edits = review.edits_from_json(run.edits)
    source = project.filename or "pasted.fieldbook"
    try:
        text = apply_edits(project.text, edits, source=source) if edits else project.text
        fieldbook = with_presets(
            parse_fieldbook(text, source=source),
            relative=choice.relative,
            misclosure=choice.misclosure,
        )
        with queue.slot() if queue is not None else contextlib.nullcontext():
            return adjust_parsed(fieldbook)
    except SurveyError:
        return None


def latest_result(
    store: Store,
    project: Project,
    choice: StandardsChoice | None = None,
    queue: Slots | None = None,
) -> AdjustmentResult | None:
    """The latest finished run's result (with the presets of ``choice``), or None."""
    return result_with_presets(
        project, store.latest_run(project.id), choice or StandardsChoice(), queue
    )


def issues_with_text(project: Project, issues: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Field book errors with the text of their line, for the error list."""
    lines = _LINE_BREAK.split(project.text)
    out = []
    for issue in issues:
        number = issue.get("line", 0)
        text = lines[number - 1] if isinstance(number, int) and 0 < number <= len(lines) else ""
        out.append({**issue, "text": text[:300]})
    return out


# --------------------------------------------------------------------------------------
# the project list and the JSON of projects and runs


def list_verdict(run: Run | None) -> tuple[str, str]:
    """(state, words) for a project's latest run in the list."""
    if run is None:
        return "none", "Not adjusted"
    if not run.finished or run.summary is None:
        return "fail", _failure_words(run)
    summary = run.summary
    test = summary.get("global_test")
    flagged = summary.get("flagged", 0)
    unchecked = summary.get("uncontrolled", 0)
    converged = summary.get("converged", True)
    # the stored summary has no misclosure count: the list decides on flags and checks alone
    passed = None if test is None else bool(test.get("passed"))
    state = verdict_state(converged=converged, passed=passed, flagged=flagged, unchecked=unchecked)
    if not converged:
        return state, "Not converged"
    if test is None:
        return state, "Not tested (no redundancy)"
    if state == "fail":
        return state, f"Fails, {flagged} flagged" if flagged else "Fails"
    if flagged:
        return state, f"Passes, {flagged} flagged"
    if unchecked:
        noun = "observation" if unchecked == 1 else "observations"
        return state, f"Passes, but {unchecked} {noun} can no longer be checked"
    return state, "Passes"


def _failure_words(run: Run) -> str:
    """What the list says of a run that stopped: an upload that failed, or a later re-run."""
    kind = (run.error or {}).get("kind")
    what = {"fieldbook": "field book errors", "network": "the network cannot be adjusted"}
    head = "Upload failed" if run.number <= 1 else "Re-run failed"
    return f"{head}: {what[kind]}" if kind in what else head


def project_list_items(store: Store, viewer: Actor | None = None) -> list[dict[str, Any]]:
    """Every stored project (``viewer`` may see) with its latest verdict, as the list shows it."""
    items = []
    for p in store.list_projects(viewer):
        summary = (p.latest.summary or {}) if p.latest else {}
        state, words = list_verdict(p.latest)
        items.append(
            {
                "id": p.id,
                "name": display_name(p.name, p.filename),
                "filename": p.filename,
                "created": p.created,
                "points": summary.get("points"),
                "observations": summary.get("observations"),
                "state": state,
                "verdict": words,
                "failed": p.latest is not None and not p.latest.finished,
                "owner": p.owner,
            }
        )
    return items


def project_json(
    project_id: str, name: str, filename: str, created: str, sha256: str, run: Run | None
) -> dict[str, Any]:
    """A project's record in the JSON API."""
    return {
        "id": project_id,
        "name": name,
        "filename": filename,
        "created": created,
        "sha256": sha256,
        "status": None if run is None else run.status,
    }


def projects_json(store: Store, viewer: Actor | None = None) -> list[dict[str, Any]]:
    """Every stored project (``viewer`` may see) with the summary of its latest run."""
    projects = []
    for p in store.list_projects(viewer):
        item = project_json(p.id, p.name, p.filename, p.created, p.sha256, p.latest)
        item["summary"] = p.latest.summary if p.latest else None
        projects.append(item)
    return projects


def run_payload(run: Run | None) -> dict[str, Any]:
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


def project_detail_json(store: Store, project: Project) -> dict[str, Any]:
    """One project with its latest result and every run's settings and summary."""
    run = store.latest_run(project.id)
    body = project_json(
        project.id, project.name, project.filename, project.created, project.sha256, run
    )
    body.update(run_payload(run))
    # the imported file (survey XML, CSV) beside the field book; null for an uploaded book
    body["source"] = (
        None
        if project.source is None
        else {"filename": project.source.filename, "sha256": project.source.sha256}
    )
    approvals = store.approvals(project.id)
    body["runs"] = [
        {
            "id": r.id,
            "number": r.number,
            "created": r.created,
            "status": r.status,
            "edits": r.edits,
            "summary": r.summary,
            # who started it (null: before accounts; "" on the workstation) and its approval
            "started_by": r.started_by,
            "approval": approval_json(approvals.get(r.id)),
        }
        for r in store.runs(project.id)
    ]
    return body


def approval_json(approval: Approval | None) -> dict[str, Any] | None:
    """A run's approval for issue in the JSON API (null when it is not approved)."""
    if approval is None:
        return None
    return {
        "approved_by": approval.approved_by,
        "approved": approval.approved,
        "run_number": approval.run_number,
        "fieldbook_sha256": approval.fieldbook_sha256,
    }


def run_json(run: Run) -> dict[str, Any]:
    """One run: its settings (the decisions in force) and its result or error."""
    body: dict[str, Any] = {
        "id": run.id,
        "number": run.number,
        "created": run.created,
        "status": run.status,
        "settings": run.settings or {"edits": []},
        "result": run.result_json,
    }
    if run.error is not None:
        body["error"] = run.error.get("message", "")
    return body


# --------------------------------------------------------------------------------------
# the review: its state, re-runs, retries


@dataclass
class ReviewState:
    """The run under review, the decisions in force and queued, and the field book they give."""

    project: Project
    base: Run | None
    result: AdjustmentResult | None
    in_force: list[ObservationEdit]
    pending: list[PendingEdit]
    pending_edits: list[ObservationEdit]
    text: str
    problems: list[str] = field(default_factory=list)


def load_state(store: Store, project: Project) -> ReviewState:
    """The review's state from the latest finished run and the queue."""
    base = store.latest_run(project.id, finished=True)
    problems: list[str] = []
    try:
        in_force = review.edits_from_json(base.edits) if base is not None else []
    except EditError as exc:
        in_force, problems = [], [str(exc)]
    pending = store.pending_edits(project.id)
    pending_edits = []
    for item in pending:
        try:
            pending_edits.append(review.edit_from_json(item.edit))
        except EditError as exc:
            problems.append(str(exc))
    text = project.text
    if in_force:
        try:
            text = apply_edits(project.text, in_force, source=project.filename)
        except SurveyError as exc:
            problems.append(str(exc))
    result = None
    if base is not None:
        result = base.result()
        if result is None:  # stored by an incompatible version: adjust the same text again
            try:
                result = adjust_fieldbook(text, source=project.filename)
            except SurveyError as exc:
                problems.append(str(exc))
    return ReviewState(project, base, result, in_force, pending, pending_edits, text, problems)


def prepare_decision(
    state: ReviewState, line: int, values: dict[str, str], day: str
) -> tuple[ObservationEdit, str]:
    """The decision a review form asks for, and why it cannot be queued ("" when it can).

    ``values`` holds the form's action, reason, sd and value.  The decision must name an
    action, make sense for the line (not leave out what is left out), and, with every
    decision in force and queued, still give a field book that reads.
    """
    project, action = state.project, values["action"]
    message = ""
    if state.result is None:
        message = "This project has no adjusted run to decide on."
    elif action not in ACTIONS:
        message = f"line {line}: choose leave out, bring back, change sd or correct the value"
    elif len(values["sd"]) > review.MAX_SD_CHARS:
        message = f"line {line}: the standard deviation is too long"
    elif action == "correct" and len(values["value"]) > MAX_VALUE_CHARS:
        message = f"line {line}: the corrected value is too long"
    else:
        left_out = review.ignored_after(state.result, state.pending_edits).get(line)
        if action == "exclude" and left_out:
            message = f"line {line} is already left out"
        elif action == "include" and left_out is False:
            message = f"line {line} is already used in the adjustment"
    edit = ObservationEdit(
        line=line,
        action=action,
        reason=clean_reason(values["reason"]),
        date=day,
        sd=values["sd"] if action == "sd" else None,
        value=values["value"] if action == "correct" else None,
    )
    if not message and action == "correct":
        # the value it replaces, as the line reads once the earlier decisions are written in
        try:
            text = apply_edits(
                project.text, [*state.in_force, *state.pending_edits], source=project.filename
            )
            edit = dataclasses.replace(
                edit, previous=booked_value(text, line, source=project.filename)
            )
        except SurveyError as exc:
            message = str(exc)
    if not message:
        try:
            apply_edits(
                project.text, [*state.in_force, *state.pending_edits, edit], source=project.filename
            )
        except SurveyError as exc:
            message = str(exc)
    return edit, message


def rerun(store: Store, state: ReviewState, by: Actor | None = None) -> tuple[int | None, str]:
    """Adjust with every decision in force and queued; (new run id or None, problem).

    Raises ``DecisionsChanged`` when the queue changed since ``state`` was read.
    """
    project = state.project
    edits = [*state.in_force, *state.pending_edits]
    try:
        text = apply_edits(project.text, edits, source=project.filename)
    except SurveyError as exc:
        return None, str(exc)
    settings = {
        "edits": [review.edit_to_json(e) for e in edits],
        "based_on": state.base.id if state.base else None,
    }
    run_id = store.start_run(project.id, settings, by=by)
    try:
        result = adjust_fieldbook(text, source=project.filename or "edited.fieldbook")
    except SurveyError as exc:
        store.finish_run(run_id, error=exc)  # the decisions stay queued: undo one and re-run
        return run_id, ""
    except Exception:
        store.finish_run(run_id, error="the adjustment stopped unexpectedly")
        raise
    # refused (DecisionsChanged) unless the queue is still exactly the one read above
    store.finish_run(run_id, result=result, consumed=tuple(p.id for p in state.pending))
    return run_id, ""


def run_result(project: Project, run: Run) -> AdjustmentResult:
    """A finished run's result; adjusted again with its decisions if stored by another version."""
    result = run.result()
    if result is None:
        edits = review.edits_from_json(run.edits)
        text = apply_edits(project.text, edits, source=project.filename) if edits else project.text
        result = adjust_fieldbook(text, source=project.filename)
    return result


class NoSuchRun(LookupError):
    """A run asked for by number that the project does not have (finished)."""


def _finished_run(store: Store, project: Project, value: str | None) -> Run:
    text = (value or "").strip()
    if not (text.isdigit() and len(text) <= 9):
        raise NoSuchRun("There is no run with this number.")
    run = store.run(project.id, int(text))
    if run is None or not run.finished:
        raise NoSuchRun("This project has no finished run with this number.")
    return run


def compare_runs(
    store: Store, project: Project, a_arg: str | None, b_arg: str | None
) -> dict[str, Any]:
    """The comparison page's context: runs ``a`` and ``b`` (by default the last two finished).

    Raises ``NoSuchRun`` for a number that names no finished run, or no earlier run.
    """
    finished = [r for r in store.runs(project.id) if r.finished]
    context: dict[str, Any] = {
        "project": project,
        "name": display_name(project.name, project.filename),
        "runs": finished,
        "comparison": None,
    }
    if len(finished) < 2 and a_arg is None and b_arg is None:
        return context
    b = _finished_run(store, project, b_arg) if b_arg else store.run(project.id, finished[-1].id)
    assert b is not None
    if a_arg:
        a = _finished_run(store, project, a_arg)
    else:
        earlier = [r for r in finished if r.id < b.id]
        if not earlier:
            raise NoSuchRun("There is no earlier run to compare with.")
        found = store.run(project.id, earlier[-1].id)
        assert found is not None
        a = found
    result_a, result_b = run_result(project, a), run_result(project, b)
    edits_a, edits_b = review.edits_from_json(a.edits), review.edits_from_json(b.edits)
    made, withdrawn = review.decisions_between(edits_a, edits_b)
    context.update(
        {
            "name": display_name(project.name, project.filename, result_b.title),
            "a": a,
            "b": b,
            "latest_id": finished[-1].id,
            "comparison": review.compare(result_a, result_b),
            "made": review.decision_rows(made, result_b),
            "withdrawn": review.decision_rows(withdrawn, result_a),
        }
    )
    return context


def edited_fieldbook(store: Store, project: Project) -> str | bytes:
    """The upload with the decisions in force written into their lines."""
    base = store.latest_run(project.id, finished=True)
    edits = review.edits_from_json(base.edits) if base is not None else []
    if edits:
        return apply_edits(project.text, edits, source=project.filename)
    return project.fieldbook


def retry_interrupted(
    store: Store,
    project: Project,
    interrupted: Run,
    progress: Callable[[str, int], None],
    run_id: int,
) -> None:
    """Adjust with the interrupted run's decisions and finish ``run_id``.

    Decisions that were queued for the interrupted re-run are still queued (it never
    finished); this run applies them, so it takes them off the queue when it succeeds.
    """
    try:
        edits = review.edits_from_json(interrupted.edits)
        text = apply_edits(project.text, edits, source=project.filename) if edits else project.text
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


def purge_deleted(store: Store, keep_days: int, *, who: str = "the retention") -> None:
    """Erase the projects deleted ``keep_days`` days ago or more, one log line each."""
    for project in store.purge_deleted(keep_days):
        logger.info(
            "project %s (%r) purged for good by %s (deleted %s, kept %d days)",
            project.id,
            display_name(project.name, project.filename),
            who,
            project.deleted,
            keep_days,
        )


class ProposalCache:
    """The slower second opinions (robust, snooping) of the last runs, shared by worker threads.

    A value is computed outside the lock (it may take seconds); two threads asking for the
    same key at once may both compute it, and the later one's value is kept.
    """

    def __init__(self, size: int = 16) -> None:
        self._size = size
        self._values: OrderedDict[tuple[Any, ...], Any] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: tuple[Any, ...], compute: Callable[[], Any]) -> Any:
        """The value kept under ``key``, else ``compute()`` kept from now on."""
        with self._lock:
            if key in self._values:
                self._values.move_to_end(key)
                return self._values[key]
        value = compute()
        with self._lock:
            self._values[key] = value
            self._values.move_to_end(key)
            while len(self._values) > self._size:
                self._values.popitem(last=False)
        return value
