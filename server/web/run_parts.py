"""What the pages of one stored run show, made once per run and kept for the next request.

A finished run never changes, so its result (adjusted again when presets are chosen), its
formatted observation rows and its drawn network plot are the same for every request that
shows it.  They are kept in a small per-application cache (least recently used first out),
keyed by the project, the run's id and creation time and the presets chosen: a new run, a
re-run after decisions or another preset is another key.  Nothing user-typed is kept
unescaped: the plot fragment is rendered by the autoescaping templates.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from fastapi import Request
from markupsafe import Markup

from server.report import plot
from server.report import tables as report
from server.results.result import AdjustmentResult
from server.store import projects as service
from server.store.projects import ProposalCache, Slots, StandardsChoice
from server.store.sqlite import Project, Run

#: Entries kept per application: a result, its rows and its plot are three entries of a run.
CACHED_PARTS = 24


def parts_cache() -> ProposalCache:
    """A new cache for ``app.state.run_parts``."""
    return ProposalCache(size=CACHED_PARTS)


def _cache(request: Request) -> ProposalCache:
    return request.app.state.run_parts  # type: ignore[no-any-return]


def _key(project: Project, run: Run, choice: StandardsChoice) -> tuple[Any, ...]:
    return (project.id, run.id, run.created, choice.query)


def latest_completed(runs: Sequence[Run]) -> Run | None:
    """The newest finished or failed run of a list (``Store.latest_run`` without a query)."""
    return next((r for r in reversed(runs) if r.status in ("finished", "failed")), None)


def result(
    request: Request,
    project: Project,
    run: Run | None,
    choice: StandardsChoice,
    queue: Slots | None = None,
) -> AdjustmentResult | None:
    """The run's result with the chosen presets (``result_with_presets``), made once per run.

    ``run`` may come from ``Store.runs`` (without the stored result): the full run is read
    only when its result is not kept already."""
    if run is None or not run.finished:
        return None

    def make() -> AdjustmentResult | None:
        full = run
        if run.detail is None:
            full = request.app.state.store.run(project.id, run.id) or run
        return service.result_with_presets(project, full, choice, queue)

    return _cache(request).get(("result", *_key(project, run, choice)), make)  # type: ignore[no-any-return]


def observation_rows(
    request: Request, project: Project, run: Run, choice: StandardsChoice, found: AdjustmentResult
) -> list[report.ObservationRow]:
    """Every observation of the run formatted as a table row (the pages slice them)."""
    return _cache(request).get(  # type: ignore[no-any-return]
        ("rows", *_key(project, run, choice)), lambda: report.observation_rows(found)
    )


def plot_fragment(
    request: Request, project: Project, run: Run, choice: StandardsChoice, found: AdjustmentResult
) -> Markup:
    """The network plot of the results page (SVG, legend and the panel's data), rendered."""

    def draw() -> Markup:
        rows = observation_rows(request, project, run, choice, found)
        data = plot.network_plot_data(found, obs_rows=rows)
        if data is None:
            return Markup("")
        template = request.app.state.templates.env.get_template("partials/network_plot.html")
        html = template.render(network_plot=data)
        return Markup(html)  # noqa: S704 (rendered by the autoescaping environment)

    return _cache(request).get(("plot", *_key(project, run, choice)), draw)  # type: ignore[no-any-return]
