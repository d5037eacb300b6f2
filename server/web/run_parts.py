"""What the pages of one stored run show, made once per run and kept for the next request.

A finished run never changes, so its result (adjusted again when presets are chosen), its
formatted observation rows and its network plot (laid out and drawn) are the same for every
request that shows it (the results and review pages, the downloads).  They are kept in a
small per-application cache (least recently used first out), keyed by the project, the
run's id and creation time and the presets chosen: a new run, a re-run after decisions or
another preset is another key.  Nothing user-typed is kept unescaped: the plot fragment is
rendered by the autoescaping templates.
"""

from __future__ import annotations

import dataclasses
import logging
import threading
from collections import OrderedDict
from collections.abc import Callable, Sequence
from typing import Any, Protocol, TypeVar

from markupsafe import Markup

from server.report import plot, review
from server.report import tables as report
from server.results.result import AdjustmentResult
from server.review.tau import TauTest, tau_test
from server.store import projects as service
from server.store.projects import ReviewState, Slots, StandardsChoice, load_state
from server.store.sqlite import Project, Run, Store

T = TypeVar("T")

logger = logging.getLogger(__name__)


class AppBound(Protocol):
    """What the parts need of a request: its application (store, cache, templates)."""

    @property
    def app(self) -> Any: ...


#: What the cache may hold, in observations of the runs its entries belong to (a run's
#: result, rows, plot layout, plot drawing and review pages are each about 1-2 kB per
#: observation): some 60-100 MB at most, five or six runs of 2,000 observations.
KEPT_OBSERVATIONS = 60_000
#: Runs of more observations are not kept (their parts are made for each request as before).
MAX_KEPT_OBSERVATIONS = 10_000


class RunPartsCache:
    """Least recently used first out, bounded by the observations of what it holds.

    Shared by the worker threads: a value is made outside the lock (it may take a second);
    two threads asking for the same key at once may both make it, and one value is kept.
    """

    def __init__(self, budget: int = KEPT_OBSERVATIONS) -> None:
        self._budget = budget
        self._held = 0
        self._values: OrderedDict[tuple[Any, ...], tuple[int, Any]] = OrderedDict()
        self._lock = threading.Lock()

    def get(
        self,
        key: tuple[Any, ...],
        weight: int,
        make: Callable[[], T],
        keep: Callable[[T], bool] | None = None,
    ) -> T:
        """The value kept under ``key``, else ``make()``, kept if it fits (and ``keep`` of it)."""
        with self._lock:
            if key in self._values:
                self._values.move_to_end(key)
                return self._values[key][1]  # type: ignore[no-any-return]
        value = make()
        if weight > self._budget or (keep is not None and not keep(value)):
            return value
        with self._lock:
            previous = self._values.pop(key, None)
            self._held += weight - (previous[0] if previous else 0)
            self._values[key] = (weight, value)
            while self._held > self._budget:
                _, (dropped, _) = self._values.popitem(last=False)
                self._held -= dropped
        return value


def parts_cache() -> RunPartsCache:
    """A new cache for ``app.state.run_parts``."""
    return RunPartsCache()


def _cache(request: AppBound) -> RunPartsCache:
    return request.app.state.run_parts  # type: ignore[no-any-return]


def _key(project: Project, run: Run, choice: StandardsChoice) -> tuple[Any, ...]:
    return (project.id, run.id, run.created, choice.query)


def _kept(
    request: AppBound,
    run: Run,
    key: tuple[Any, ...],
    make: Callable[[], T],
    keep: Callable[[T], bool] | None = None,
) -> T:
    """``make()`` kept under ``key``, unless the run is too large to keep."""
    observations = (run.summary or {}).get("observations")
    if not isinstance(observations, int) or observations > MAX_KEPT_OBSERVATIONS:
        return make()
    return _cache(request).get(key, max(observations, 1), make, keep)


def latest_completed(runs: Sequence[Run]) -> Run | None:
    """The newest finished or failed run of a list (``Store.latest_run`` without a query)."""
    return next((r for r in reversed(runs) if r.status in ("finished", "failed")), None)


def result(
    request: AppBound,
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

    return _kept(request, run, ("result", *_key(project, run, choice)), make)


def observation_rows(
    request: AppBound, project: Project, run: Run, choice: StandardsChoice, found: AdjustmentResult
) -> list[report.ObservationRow]:
    """Every observation of the run formatted as a table row (the pages slice them)."""
    return _kept(
        request,
        run,
        ("rows", *_key(project, run, choice)),
        lambda: report.observation_rows(found),
    )


def plot_data(
    request: AppBound, project: Project, run: Run, choice: StandardsChoice, found: AdjustmentResult
) -> dict[str, Any] | None:
    """The network plot's layout with the side panel's figures (``network_plot_data``)."""

    def lay_out() -> dict[str, Any] | None:
        rows = observation_rows(request, project, run, choice, found)
        return plot.network_plot_data(found, obs_rows=rows)

    return _kept(request, run, ("plot data", *_key(project, run, choice)), lay_out)


def plot_fragment(
    request: AppBound, project: Project, run: Run, choice: StandardsChoice, found: AdjustmentResult
) -> Markup:
    """The network plot of the results page (SVG, legend and the panel's data), rendered."""

    def draw() -> Markup:
        data = plot_data(request, project, run, choice, found)
        if data is None:
            return Markup("")
        template = request.app.state.templates.env.get_template("partials/network_plot.html")
        html = template.render(network_plot=data)
        return Markup(html)  # noqa: S704 (rendered by the autoescaping environment)

    return _kept(request, run, ("plot", *_key(project, run, choice)), draw)


def review_rows(
    request: AppBound, state: ReviewState, tau: TauTest | None, page: report.Page
) -> list[review.ReviewRow]:
    """One page of the review's rows of the run under review (its field book text and result
    are those of that run, so the rows are the same until another run is reviewed)."""
    assert state.base is not None and state.result is not None
    found, text = state.result, state.text

    def make() -> list[review.ReviewRow]:
        return review.review_rows(found, review.source_lines(text), tau, page.window)

    base = state.base
    key = ("review", state.project.id, base.id, base.created, page.start, page.stop)
    return _kept(request, base, key, make)


def review_state(request: AppBound, store: Store, project: Project, runs: list[Run]) -> ReviewState:
    """The review's state (``load_state``: the run under review, its result, the decisions in
    force and queued, the field book they give), kept per run under review and queue.

    A decision queued or undone changes the queue and a re-run the run under review, so
    either is another key; a state read while another run finished or the queue changed
    is used for this request and not kept.  Forms that change the review read the state
    afresh (``load_state``); this serves the page only."""
    base = next((r for r in reversed(runs) if r.finished), None)
    if base is None:
        return load_state(store, project)
    pending = tuple(p.id for p in store.pending_edits(project.id))
    key = ("review state", project.id, base.id, base.created, pending)

    def current(state: ReviewState) -> bool:
        return (
            state.base is not None
            and (state.base.id, state.base.created) == (base.id, base.created)
            and tuple(p.id for p in state.pending) == pending
        )

    state = _kept(request, base, key, lambda: load_state(store, project), current)
    return dataclasses.replace(state, project=project)  # the project as read for this request


class _Made:
    """The application without a request: parts made on the thread that adjusted the run."""

    def __init__(self, app: Any) -> None:
        self.app = app


def prepare(app: Any, project_id: str, run_id: int) -> None:
    """Make the results and review pages' parts of a run that has just finished, so the
    page the surveyor opens next is drawn from the cache (the result read back from the
    store, its rows, the network plot, the review's state and first page of rows).

    Called on the adjusting thread after the run is stored; a part that cannot be made
    is left to the page, which makes it (and reports any problem) as before.
    """
    store: Store = app.state.store
    made = _Made(app)
    try:
        project = store.get_project(project_id)
        run = store.run(project_id, run_id)
        if project is None or run is None or not run.finished:
            return
        choice = StandardsChoice()
        found = result(made, project, run, choice)
        if found is None:
            return
        plot_fragment(made, project, run, choice, found)
        state = review_state(made, store, project, store.runs(project_id))
        if state.result is not None and state.base is not None and state.base.id == run_id:
            first = report.page(len(state.result.observations), 1)
            review_rows(made, state, tau_test(state.result), first)
    except Exception:  # the pages make what is missing themselves
        logger.exception("run %s: its pages' parts could not be made ahead", run_id)
