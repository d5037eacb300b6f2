"""The single front door: field book text in, frozen adjustment result out.

Used by the command line, the web service and the tests alike.
"""

from __future__ import annotations

from .adjust import ProgressCallback, adjust
from .fieldbook import parse_fieldbook
from .fieldbook_model import Fieldbook
from .misclosures import leveling_misclosures
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
    if progress is not None:
        progress("parse", 0)
    return adjust_parsed(parse_fieldbook(text, source=source), progress=progress)


def adjust_parsed(fieldbook: Fieldbook, *, progress: ProgressCallback | None = None) -> AdjustmentResult:
    """Adjust an already parsed field book (re-runs with edited observations start here).

    Raises ``NetworkError`` when the network cannot be adjusted.
    """
    report = progress or _quiet
    report("network", 0)
    network = build_network(fieldbook)
    warnings = [issue.format(fieldbook.source) for issue in fieldbook.warnings]
    warnings += list(network.warnings)
    report("misclosures", 0)
    misclosures = leveling_misclosures(fieldbook) if network.vertical else ()
    solution = adjust(network, progress=progress)
    report("result", 0)
    return build_result(network, solution, misclosures, warnings)


def _quiet(stage: str, step: int) -> None:
    del stage, step
