"""The single front door: field book text in, frozen adjustment result out.

Used by the command line, the web service and the tests alike.
"""

from __future__ import annotations

import contextlib
import gc
from collections.abc import Iterator

from server.engine.gauss_newton import ProgressCallback, adjust
from server.errors import FieldbookError, Issue, NetworkError
from server.fieldbook.lexer import MAX_ISSUES
from server.fieldbook.model import Fieldbook
from server.fieldbook.parser import parse_fieldbook
from server.forked import Pending
from server.model.misclosures import Misclosure, leveling_misclosures
from server.model.network import Network, build_network
from server.model.traverse import traverse_misclosures
from server.results.result import AdjustmentResult, build_result
from server.settings import WorkLimits

#: No limits: the command line's default.
UNLIMITED = WorkLimits()


def adjust_fieldbook(
    text: str | bytes,
    *,
    source: str = "",
    progress: ProgressCallback | None = None,
    limits: WorkLimits = UNLIMITED,
    forked: bool = False,
) -> AdjustmentResult:
    """Parse, check, adjust and test a field book.

    ``forked``: compute the misclosures in a child process beside the adjustment
    (``server/forked.py``), for a process that runs nothing else (the command line).

    ``progress``, if given, is called as ``progress(stage, step)`` as the work
    goes on: "parse", "network", "misclosures", "start values", "iteration"
    (step = 1, 2, …), "statistics" and "result" (step 0 except for iterations).

    Raises
    ------
    FieldbookError
        The text has errors (every one found, with line numbers).
    NetworkError
        The network cannot be adjusted (the message names the points), or it has
        more unknowns than ``limits`` allow.
    FieldbookError
        Also when the field book has more observations than ``limits`` allow.
    """
    with paused_gc():
        if progress is not None:
            progress("parse", 0)
        fieldbook = parse_fieldbook(text, source=source)
        return _adjust_parsed(fieldbook, progress, limits, forked)


def adjust_parsed(
    fieldbook: Fieldbook,
    *,
    progress: ProgressCallback | None = None,
    limits: WorkLimits = UNLIMITED,
) -> AdjustmentResult:
    """Adjust an already parsed field book (re-runs with edited observations start here).

    Raises ``NetworkError`` when the network cannot be adjusted and ``FieldbookError``
    or ``NetworkError`` when it is larger than ``limits`` allow (checked before the work).
    """
    with paused_gc():
        return _adjust_parsed(fieldbook, progress, limits)


def check_observation_limit(fieldbook: Fieldbook, limits: WorkLimits) -> None:
    """Refuse a field book with more observations than allowed, naming both numbers.

    The error points at the first observation over the limit, so the surveyor sees
    where to split the book.
    """
    limit, count = limits.max_observations, len(fieldbook.observations)
    if limit is None or count <= limit:
        return
    first_over = fieldbook.observations[limit]
    message = (
        f"the field book has {count:,} observations, more than the {limit:,} this "
        f"service adjusts in one field book (this is observation {limit + 1:,}); "
        "split it into smaller field books, or ask the administrator to raise "
        "the observation limit"
    )
    raise FieldbookError([Issue(first_over.line, "", message)], source=fieldbook.source)


def check_adjustable_now(fieldbook: Fieldbook) -> None:
    """Refuse what the field book accepts but this version cannot adjust, naming the line.

    Planned observations (``?``) have no value (exit 2, every such line): they are for
    designing a network, not for adjusting one.
    """
    table = fieldbook.table
    planned = sorted(set(table.line[table.planned].tolist()))
    if planned:
        message = (
            "'?' marks a planned observation: it has a standard deviation but no value "
            "yet, so it cannot be adjusted; book the measured value, or leave the line "
            "out of the field book you adjust"
        )
        issues = [Issue(line, "?", message) for line in planned[:MAX_ISSUES]]
        raise FieldbookError(issues, source=fieldbook.source, count=len(planned))


def check_unknown_limit(network: Network, limits: WorkLimits) -> None:
    """Refuse a network with more unknowns than allowed, naming both numbers."""
    limit, count = limits.max_unknowns, len(network.parameters)
    if limit is None or count <= limit:
        return
    raise NetworkError(
        f"the network has {count:,} unknowns (coordinates, heights and "
        f"orientations), more than the {limit:,} this service adjusts at once; "
        "split the field book, or ask the administrator to raise the "
        "unknown limit"
    )


def _adjust_parsed(
    fieldbook: Fieldbook,
    progress: ProgressCallback | None,
    limits: WorkLimits,
    forked: bool = False,
) -> AdjustmentResult:
    report = progress or _quiet
    check_observation_limit(fieldbook, limits)
    check_adjustable_now(fieldbook)
    report("network", 0)
    network = build_network(fieldbook)
    check_unknown_limit(network, limits)
    warnings = [issue.format(fieldbook.source) for issue in fieldbook.warnings]
    warnings += list(network.warnings)
    report("misclosures", 0)

    def misclosures_of_book() -> tuple[Misclosure, ...]:
        found = leveling_misclosures(fieldbook) if network.vertical else ()
        if network.horizontal:
            found += traverse_misclosures(fieldbook)
        return found

    if not forked:
        misclosures = misclosures_of_book()
        solution = adjust(network, progress=progress)
    else:  # the misclosures read only the book: on the second core, beside the engine
        pending = Pending(misclosures_of_book)
        try:
            solution = adjust(network, progress=progress)
        except Exception:
            # an error of the misclosures came first in the plain order: it still does
            try:
                pending.result()
            finally:
                pending.close()
            raise
        except BaseException:  # interrupted: stop the child too
            pending.close()
            raise
        misclosures = pending.result()
    report("result", 0)
    return build_result(network, solution, misclosures, warnings)


@contextlib.contextmanager
def paused_gc() -> Iterator[None]:
    """Hold off the cyclic garbage collector while a result is built.

    A large network makes hundreds of thousands of small objects that live
    until the result is written; each full collection walks all of them, which
    cost 30-40 % of the time of the stages around the engine at 100k marks.
    Reference counting still frees everything as usual; collection resumes
    afterwards (only if it was on when this began, so nesting and concurrent
    adjustments leave it as they found it).
    """
    was_enabled = gc.isenabled()
    if was_enabled:
        gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.enable()


def _quiet(stage: str, step: int) -> None:
    del stage, step
