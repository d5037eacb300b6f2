"""The parsed field book: frozen statements with their line numbers, values in SI.

``fieldbook.parse_fieldbook`` builds these; ``network.py`` reads them.  Every
length is in metres and every angle in radians; ``length_unit`` and
``angle_unit`` remember what the file used so results can be written back in
the same units.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import date, datetime
from typing import TYPE_CHECKING

from server.errors import Issue
from server.units import Quantity

if TYPE_CHECKING:
    from server.fieldbook.table import ObservationTable

#: Observation kinds as they appear in results (``direction`` for each line of a round).
OBSERVATION_KINDS = (
    "level",
    "distance",
    "angle",
    "direction",
    "azimuth",
    "slope",
    "zenith",
    "baseline",
)
#: Kinds that observe horizontal geometry.
HORIZONTAL_KINDS = frozenset({"distance", "angle", "direction", "azimuth"})
#: Kinds that couple heights and positions (need the geodetic 3D model and a ``crs``).
SPATIAL_KINDS = frozenset({"slope", "zenith", "baseline"})
#: Refraction coefficient when the field book has no ``refraction`` line (common practice).
DEFAULT_REFRACTION = 0.13
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
    latitude: float | None = None
    longitude: float | None = None
    geoid: float | None = None


@dataclass(frozen=True, slots=True)
class Crs:
    """The ``crs`` line: the coordinate reference system of every east/north of the file.

    Either ``epsg`` (``crs EPSG:CODE``, a projected CRS checked for syntax only here;
    ``server/geodesy`` resolves it) or a local site grid (``crs local``): transverse
    Mercator on GRS80, scale 1 on the meridian through ``latitude``/``longitude``
    (radians, south and west negative), that point at ``false_east``/``false_north``
    (metres).  ``text`` is the line as given after ``crs`` ("EPSG:32633", "local lat=...").
    """

    line: int
    text: str
    epsg: int | None = None
    latitude: float | None = None
    longitude: float | None = None
    false_east: float = 0.0
    false_north: float = 0.0

    @property
    def local(self) -> bool:
        """True for a site grid (``crs local``), False for ``crs EPSG:CODE``."""
        return self.epsg is None


@dataclass(frozen=True, slots=True)
class BaselineVector:
    """The three components of a ``baseline`` line and their 3×3 covariance.

    ``components`` are ΔX, ΔY, ΔZ of TO − FROM in the Earth-centred frame, metres.
    ``sd`` are the three standard deviations as booked (own ``sd=`` or ``defaults
    baseline=``), metres, before ``sd_scale`` (the ``scale baseline=`` factor in force);
    ``correlations`` are ρxy, ρxz, ρyz (0 without ``corr=``).  ``covariance`` is the
    matrix the adjustment weights with, in m², row by row:
    C_ij = (sd_scale·sd_i)·(sd_scale·sd_j)·ρ_ij, positive definite (the parser refuses
    anything else).
    """

    components: tuple[float, float, float]
    sd: tuple[float, float, float]
    correlations: tuple[float, float, float] = (0.0, 0.0, 0.0)
    sd_scale: float = 1.0
    covariance: tuple[tuple[float, float, float], ...] = ()


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

    A ``baseline`` is one observation with three correlated components, kept
    whole so that the model evaluates it as one 3-row block: ``baseline``
    holds ΔX, ΔY, ΔZ (m) and their 3×3 covariance (m², ``scale baseline=``
    applied).  For it ``value`` is the length of the vector (m, a summary for
    listings, not what is adjusted) and ``sigma`` the root mean square of the
    three scaled standard deviations (a summary too); ``centering`` is the σ
    the model adds at each end in the local east and north directions.

    A planned observation (``?`` as its value) has ``planned`` True and NaN as
    ``value`` and ``booked`` (``baseline.components`` NaN too): it has a
    standard deviation but no value, for designing a network, and cannot be
    adjusted.
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
    planned: bool = False
    baseline: BaselineVector | None = None


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
    """Everything a field book says, in file order.

    The geodetic header: ``crs`` (None without a ``crs`` line), ``geoid_undulation``
    (metres; None without a ``geoid`` line, then points without their own ``geoid=``
    have undulation 0), ``refraction`` (the coefficient k in force) and ``epoch``
    (a ``date``, or a ``datetime`` in UTC when a time was given; None without one).

    ``observations`` is a sequence of ``Observation`` in file order: the parser gives a
    lazy view (``table.ObservationRows``) whose objects are made only when read, and
    ``table`` holds the same observations as arrays, which the stages on the way to the
    adjustment read instead.  A field book built in code may give any sequence (a tuple).
    """

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
    observations: Sequence[Observation] = ()
    rounds: tuple[DirectionRound, ...] = ()
    relative_pairs: tuple[RelativePair, ...] = ()
    warnings: tuple[Issue, ...] = ()
    text_sha256: str = ""
    crs: Crs | None = None
    geoid_undulation: float | None = None
    refraction: float = DEFAULT_REFRACTION
    epoch: date | datetime | None = None
    _table: ObservationTable | None = field(default=None, init=False, repr=False, compare=False)

    @property
    def table(self) -> ObservationTable:
        """Every observation as columns (``fieldbook/table.py``), row k = ``observations[k]``.

        Made once: the parser's own, or tabled from the objects of a book built in code.
        """
        table = self._table
        if table is None:
            from server.fieldbook.table import table_of

            table, rows = table_of(self.observations)
            if rows is not None:
                table = table.take(rows)
            object.__setattr__(self, "_table", table)
        return table
