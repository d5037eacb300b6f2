"""Typed records of imported field data: what a data collector file holds, in SI units.

The readers (``survey_xml``, ``csv_observations``) produce these; ``rounds`` reduces the
raw readings; ``fieldbook_writer`` turns the result into field book text.  Every record
keeps its ``Source`` so that each written line can name the element (and line) it came from.
"""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(frozen=True, slots=True)
class Source:
    """Where a record was read: a line of the input file and the element (or ``row``)."""

    line: int
    element: str
    kind: str = "xml"

    def note(self) -> str:
        return f"{self.kind} line {self.line}: {self.element}"


@dataclass(frozen=True, slots=True)
class ControlPoint:
    """A point with coordinates: grid (east, north) or geographic (lat, lon, radians)."""

    name: str
    source: Source
    east: float | None = None
    north: float | None = None
    height: float | None = None
    lat: float | None = None
    lon: float | None = None
    control: bool = False
    sd_en: float | None = None
    sd_h: float | None = None


@dataclass(frozen=True, slots=True)
class RawReading:
    """One pointing of a total station: any of direction, zenith and slope distance.

    ``face`` is 1 (face I, direct) or 2 (face II, reverse); ``set_id`` groups the rounds.
    Angles are radians, lengths metres.
    """

    setup: str
    station: str
    target: str
    source: Source
    hz: float | None = None
    zenith: float | None = None
    slope: float | None = None
    face: int = 1
    set_id: str = ""
    hi: float | None = None
    ht: float | None = None
    unused: bool = False
    #: the setup's instrumentDetailsID, "" when not named
    instrument: str = ""


@dataclass(frozen=True, slots=True)
class GnssVector:
    """Earth-centred components of TO − FROM with their covariance (m, m²) when given.

    ``covariance`` is (xx, xy, xz, yy, yz, zz).
    """

    from_point: str
    to_point: str
    dx: float
    dy: float
    dz: float
    source: Source
    covariance: tuple[float, float, float, float, float, float] | None = None


@dataclass(frozen=True, slots=True)
class Accuracy:
    """An instrument's stated accuracies (SI): direction and zenith for face means, EDM a+b ppm."""

    name: str
    source: Source
    direction: float | None = None
    zenith: float | None = None
    distance_constant: float | None = None
    distance_ppm: float | None = None


@dataclass(frozen=True, slots=True)
class FileUnits:
    """The units the file states, and the field book units that write them back faithfully."""

    length_factor: float = 1.0  # metres per file length unit
    angle_factor: float = 1.0  # radians per file angle unit (not used for dd.mm.ss)
    packed_dms: bool = False  # angles written as dd.mmss
    fieldbook_length: str = "m"
    fieldbook_angle: str = "dms"
    source: Source | None = None


@dataclass(frozen=True, slots=True)
class SurveyData:
    """Everything read from one file, in SI units, before any reduction."""

    title: str | None = None
    title_source: Source | None = None
    crs: str | None = None
    crs_source: Source | None = None
    units: FileUnits = field(default_factory=FileUnits)
    points: tuple[ControlPoint, ...] = ()
    readings: tuple[RawReading, ...] = ()
    vectors: tuple[GnssVector, ...] = ()
    accuracies: tuple[Accuracy, ...] = ()
    #: (line, message) of what was read but needs the user's eye
    warnings: tuple[tuple[int, str], ...] = ()
