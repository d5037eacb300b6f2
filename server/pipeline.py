"""The single front door: field book text in, frozen adjustment result out.

Used by the command line, the web service and the tests alike.
"""

from __future__ import annotations

from .adjust import adjust
from .fieldbook import parse_fieldbook
from .fieldbook_model import Fieldbook
from .misclosures import leveling_misclosures
from .network import build_network
from .result import AdjustmentResult, build_result


def adjust_fieldbook(text: str | bytes, *, source: str = "") -> AdjustmentResult:
    """Parse, check, adjust and test a field book.

    Raises
    ------
    FieldbookError
        The text has errors (every one found, with line numbers).
    NetworkError
        The network cannot be adjusted (the message names the points).
    """
    return adjust_parsed(parse_fieldbook(text, source=source))


def adjust_parsed(fieldbook: Fieldbook) -> AdjustmentResult:
    """Adjust an already parsed field book (re-runs with edited observations start here).

    Raises ``NetworkError`` when the network cannot be adjusted.
    """
    network = build_network(fieldbook)
    warnings = [issue.format(fieldbook.source) for issue in fieldbook.warnings]
    warnings += list(network.warnings)
    misclosures = leveling_misclosures(fieldbook) if network.vertical else ()
    solution = adjust(network)
    return build_result(network, solution, misclosures, warnings)
