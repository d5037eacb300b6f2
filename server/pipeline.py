"""The single front door: field book text in, frozen adjustment result out.

Used by the command line, the web service and the tests alike.
"""

from __future__ import annotations

import contextlib
import gc
from collections.abc import Iterator

from .adjust import ProgressCallback, adjust
from .fieldbook import parse_fieldbook
from .fieldbook_model import Fieldbook
from .misclosures import leveling_misclosures
from .traverse import traverse_misclosures
from .network import build_network
from .result import AdjustmentResult, build_result


def adjust_fieldbook(
    text: str | bytes, *, source: str = "", progress: ProgressCallback | None = None
) -> AdjustmentResult:
    """Parse, check, adjust and test a field book.

    ``progress``, if given, is called as ``progress(stage, step)`` as the work
    goes on: "parse", "network", "misclosures", "start values", "iteration"
    (step = 1, 2, …), "statistics" and "result" (step 0 except for iterations).

    Raises
    ------
    FieldbookError
        The text has errors (every one found, with line numbers).
    NetworkError
        The network cannot be adjusted (the message names the points).
    """
    with paused_gc():
        if progress is not None:
            progress("parse", 0)
        return adjust_parsed(parse_fieldbook(text, source=source), progress=progress)


def adjust_parsed(fieldbook: Fieldbook, *, progress: ProgressCallback | None = None) -> AdjustmentResult:
    """Adjust an already parsed field book (re-runs with edited observations start here).

    Raises ``NetworkError`` when the network cannot be adjusted.
    """
    with paused_gc():
        return _adjust_parsed(fieldbook, progress)


def _adjust_parsed(fieldbook: Fieldbook, progress: ProgressCallback | None) -> AdjustmentResult:
    report = progress or _quiet
    report("network", 0)
    network = build_network(fieldbook)
    warnings = [issue.format(fieldbook.source) for issue in fieldbook.warnings]
    warnings += list(network.warnings)
    report("misclosures", 0)
    misclosures = leveling_misclosures(fieldbook) if network.vertical else ()
    if network.horizontal:
        misclosures += traverse_misclosures(fieldbook)
    solution = adjust(network, progress=progress)
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
