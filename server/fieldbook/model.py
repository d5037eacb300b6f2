"""The parsed field book: frozen statements with their line numbers, values in SI.

``fieldbook.parse_fieldbook`` builds these; ``network.py`` reads them.  Every
length is in metres and every angle in radians; ``length_unit`` and
``angle_unit`` remember what the file used so results can be written back in
the same units.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from server.errors import Issue
from server.units import Quantity

#: Observation kinds as they appear in results (``direction`` for each line of a round).
OBSERVATION_KINDS = ("level", "distance", "angle", "direction", "azimuth", "slope", "zenith")
#: Kinds that observe horizontal geometry.
HORIZONTAL_KINDS = frozenset({"distance", "angle", "direction", "azimuth"})
#: Kinds that couple heights and positions (need the 3D model).
SPATIAL_KINDS = frozenset({"slope", "zenith"})
#: Kinds whose value is an angle.
ANGULAR_KINDS = frozenset({"angle", "direction", "azimuth", "zenith"})


#: How ``tests precision=`` scales the precisions: by the a posteriori variance factor,
#: by the a priori one (1), or by the larger of the two.
PRECISION_METHODS = ("posterior", "prior", "larger")


@dataclass(frozen=True, slots=True)
class TestLevels:
    """The ``tests`` statement: significance levels, power, confidence and precision scaling."""

    alpha: float = 0.05
    snooping: float = 0.001
    power: float = 0.80
    confidence: float = 0.95
    precision: str = "posterior"


@dataclass(frozen=True, slots=True)
class TraverseTolerance:
    """``tolerance angular=K/sqrtn ratio=1:N``: K in radians, N as a number (either may be None)."""

    angular_per_sqrtn: float | None = None
    ratio: float | None = None


@dataclass(frozen=True, slots=True)
class PointStatement:
    """A ``point`` line.  ``fixed``/``weighted`` are among "", "en", "h", "enh"."""

    line: int
    name: str
    east: float | None = None
    north: float | None = None
    height: float | None = None
    fixed: str = ""
    weighted: str = ""
    sd_en: float | None = None
    sd_h: float | None = None
    note: str = ""


@dataclass(frozen=True, slots=True)
class Observation:
    """One observation line (one entry of a directions round is one ``direction``).

    ``from_point``/``at``/``to`` follow the result contract: for an angle
    BACK/AT/FORE, for a direction AT/AT/TO, otherwise FROM/None/TO.
    ``value`` is what the adjustment uses: metres (distances already
    multiplied by ``scale``) or radians (horizontal angles in [0, 2π)).
    ``sigma`` is the instrument standard deviation in force (own ``sd=`` or
    the default for the kind); ``centering`` the centering σ in metres.
    ``booked`` is the value as written, in SI but before any reduction (no
    scale factor, angles not yet brought into [0, 2π)); None means ``value``.
    """

    line: int
    kind: str
    from_point: str
    at: str | None
    to: str
    value: float
    sigma: Quantity
    centering: float = 0.0
    scale: float = 1.0
    length_km: float | None = None
    setups: int | None = None
    instrument_height: float | None = None
    target_height: float | None = None
    round_line: int | None = None
    ignored: bool = False
    note: str = ""
    booked: float | None = None


@dataclass(frozen=True, slots=True)
class DirectionRound:
    """A ``directions AT`` ... ``end`` block; ``line`` identifies it."""

    line: int
    at: str
    observation_lines: tuple[int, ...]


@dataclass(frozen=True, slots=True)
class RelativePair:
    """A ``relative A B`` line: report the relative precision of A and B, joined or not."""

    line: int
    first: str
    second: str


@dataclass(frozen=True, slots=True)
class Fieldbook:
    """Everything a field book says, in file order."""

    source: str = ""
    version: int = 1
    title: str = ""
    length_unit: str = "m"
    angle_unit: str = "dms"
    tests: TestLevels = field(default_factory=TestLevels)
    misclosure_tolerance: Quantity | None = None
    relative_tolerance: Quantity | None = None
    traverse_tolerance: TraverseTolerance = field(default_factory=TraverseTolerance)
    points: tuple[PointStatement, ...] = ()
    observations: tuple[Observation, ...] = ()
    rounds: tuple[DirectionRound, ...] = ()
    relative_pairs: tuple[RelativePair, ...] = ()
    warnings: tuple[Issue, ...] = ()
    text_sha256: str = ""
