"""The public result: frozen objects holding plain numbers, in the field book's units.

``build_result`` runs the statistics once and converts SI values to the
file's length unit, decimal degrees and arc-seconds exactly once.  The same
object feeds the command line, the JSON API, the web pages and the reports;
``to_json_dict`` writes the JSON described by ``docs/result.schema.json``: a key
never changes its meaning; new keys may be added.
"""

# The types live in ``types.py`` and the builder in ``builder.py``; this module keeps the
# names everyone imports from here.

from __future__ import annotations

from server.results.builder import build_result
from server.results.types import (
    CAUTION,
    UNCONTROLLED,
    AdjustmentResult,
    BaselineTestResult,
    Ellipse,
    GlobalTest,
    MisclosureResult,
    ObservationResult,
    PointResult,
    RelativeHeightResult,
    RelativeResult,
    Summary,
)

__all__ = [
    "CAUTION",
    "UNCONTROLLED",
    "AdjustmentResult",
    "BaselineTestResult",
    "Ellipse",
    "GlobalTest",
    "MisclosureResult",
    "ObservationResult",
    "PointResult",
    "RelativeHeightResult",
    "RelativeResult",
    "Summary",
    "build_result",
]
