"""The monitoring page: stored projects chosen as epochs, compared, and drawn.

A plain GET form (no state changes, so no token): ``/monitoring?project=ID&project=ID…``.
The work is ``server.monitoring``; this module reads the query, runs it off the event loop
and renders ``monitoring.html``.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from fastapi import APIRouter, Query, Request
from fastapi.responses import HTMLResponse
from starlette.concurrency import run_in_threadpool

from server.errors import FieldbookError, NetworkError
from server.fieldbook.parser import parse_fieldbook
from server.monitoring.command import UsageError, read_period, read_threshold
from server.monitoring.job import Monitoring, MonitoringOptions, monitor
from server.monitoring.plot import displacement_plot
from server.monitoring.series_plot import series_plot
from server.settings import WorkLimits
from server.store import projects as service
from server.store.projects import Slots
from server.store.sqlite import Actor, Store
from server.units import UnitError
from server.web import access
from server.web.dependencies import LimitsDep, QueueDep, StoreDep, render

router = APIRouter()

#: More epochs than this are refused: each is a full adjustment on the request.
MAX_EPOCHS = 24


@router.get("/monitoring", response_class=HTMLResponse)
async def monitoring_page(
    request: Request,
    store: StoreDep,
    queue: QueueDep,
    limits: LimitsDep,
    project: list[str] = Query(default=[]),  # noqa: B008 (FastAPI's way to read a list)
    confidence: str = "0.95",
    period: str = "",
    threshold: str = "",
) -> HTMLResponse:
    """Choose two or more projects (one per epoch); with them, the comparison."""
    context: dict[str, Any] = {
        "projects": service.project_list_items(store, access.viewer(request)),
        "chosen": set(project),
        "form": {"confidence": confidence, "period": period, "threshold": threshold},
        "error": None,
        "job": None,
    }
    if not project:
        return render(request, "monitoring.html", context)
    try:
        context.update(
            await run_in_threadpool(
                _compare,
                store,
                queue,
                limits,
                project,
                confidence,
                period,
                threshold,
                access.viewer(request),
            )
        )
    except (UsageError, UnitError, ValueError) as exc:
        context["error"] = str(exc)
    except FieldbookError as exc:
        context["error"] = str(exc)
    except NetworkError as exc:
        context["error"] = f"The epochs cannot be compared: {exc}"
    status = 200 if context["error"] is None else 422
    return render(request, "monitoring.html", context, status=status)


def _compare(
    store: Store,
    queue: Slots,
    limits: WorkLimits,
    ids: list[str],
    confidence: str,
    period: str,
    threshold: str,
    viewer: Actor | None = None,
) -> dict[str, Any]:
    if len(ids) < 2 or len(ids) > MAX_EPOCHS:
        raise UsageError(f"choose from 2 to {MAX_EPOCHS} projects, one per epoch")
    books = []
    for project_id in dict.fromkeys(ids):
        stored = store.get_project(project_id, visible_to=viewer)
        if stored is None:
            raise UsageError(f"there is no project {project_id!r}")
        books.append(parse_fieldbook(stored.fieldbook, source=stored.filename or stored.name))
    level = float(confidence)
    if not 0.5 <= level < 1.0:
        raise UsageError("give a confidence from 0.5 to 0.999")
    options = MonitoringOptions(
        confidence=level,
        period_days=read_period(period) if period.strip() else None,
        threshold=read_threshold(threshold, books[0].length_unit) if threshold.strip() else None,
    )
    # one slot of the service's adjustment queue for the whole comparison, and its limits
    with queue.slot():
        job = monitor(books, options, limits)
    return {
        "job": job,
        "plots": _plots(job),
        "series_plots": [series_plot(f, options.confidence) for f in job.series],
        "confidence": options.confidence,
    }


def _plots(job: Monitoring) -> list[Any]:
    first = job.epochs[0]
    plan = np.array([first.plan[first.marks.index(m)] for m in job.marks]).reshape(-1, 2)
    return [displacement_plot(c, plan, job.options.confidence) for c in job.comparisons]
