"""Reader of the open survey-XML standard (versions 1.2 and 2.0) → ``SurveyData``.

Read: ``Units`` (Metric/Imperial: linearUnit, angularUnit, directionUnit, latLongAngularUnit),
``CoordinateSystem`` (epsgCode, or a name ``EPSG:CODE``), ``CgPoint`` (text "northing easting
[elevation]" or latitude/longitude attributes; ``pntSurv="control"``), ``InstrumentDetails``
(horizAnglePrecision, zenithAnglePrecision, edmAccuracyConstant, edmAccuracyppm),
``InstrumentSetup`` (stationName or InstrumentPoint, instrumentHeight), ``Backsight``
(circle), ``TargetSetup`` (targetHeight), ``ObservationGroup`` and ``RawObservation``
(horizAngle, zenithAngle, slopeDistance, directFace, setID, targetHeight, unused),
``GPSSetup`` and ``GPSVector`` with ``GPSQCInfoLevel2`` covariances.

Security: defusedxml with DTDs, entity declarations and external references refused; the
file size is bounded before parsing; the tree is walked without recursion; every number is
checked for NaN, infinity and sizes no survey has.  Any problem is a ``FieldbookError`` whose
issues carry the XML line, never a traceback.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterator
from xml.etree.ElementTree import Element, ParseError, TreeBuilder

from defusedxml import DefusedXmlException
from defusedxml.ElementTree import DefusedXMLParser

from server.errors import FieldbookError, Issue
from server.formats.survey_records import (
    Accuracy,
    ControlPoint,
    FileUnits,
    GnssVector,
    RawReading,
    Source,
    SurveyData,
)

#: Larger files are refused before parsing (a data collector's day is a few megabytes).
MAX_BYTES = 50 * 1024 * 1024
#: Values beyond this (metres) are typing or unit mistakes, as in the field book parser.
MAX_LENGTH_M = 1e8

# Exact factors: the international foot 0.3048 m and the US survey foot 1200/3937 m (NIST and
# NOAA/NGS, 85 FR 62698, 2020; docs/references.md "Units").
LINEAR_UNITS: dict[str, tuple[float, str]] = {
    "meter": (1.0, "m"),
    "millimeter": (0.001, "m"),
    "centimeter": (0.01, "m"),
    "kilometer": (1000.0, "m"),
    "foot": (0.3048, "ft"),
    "ussurveyfoot": (1200.0 / 3937.0, "usft"),
}
ANGULAR_UNITS: dict[str, tuple[float, str]] = {
    "radians": (1.0, "deg"),
    "grads": (math.pi / 200.0, "gon"),
    "decimal degrees": (math.pi / 180.0, "deg"),
    "decimal dd.mm.ss": (math.pi / 180.0, "dms"),
}
_EPSG_RE = re.compile(r"^\s*EPSG\s*:\s*([0-9]{1,6})\s*$", re.IGNORECASE)
_PACKED_RE = re.compile(r"^([+-]?)([0-9]+)(?:\.([0-9]*))?$")
_TRUE = {"true", "1"}
_FALSE = {"false", "0"}


#: Survey XML nests about ten deep; far deeper nesting is refused (it only costs time).
MAX_DEPTH = 100


class _TooDeepError(Exception):
    pass


class _LineParser(DefusedXMLParser):  # type: ignore[misc]  # defusedxml ships no type hints
    """defusedxml's parser that also records the line on which each element starts."""

    def __init__(self) -> None:
        super().__init__(target=TreeBuilder(), forbid_dtd=True)
        self.lines: dict[int, int] = {}
        self.depth = 0

    def _start(self, tag: str, attr_list: list[str]) -> Element:
        self.depth += 1
        if self.depth > MAX_DEPTH:
            raise _TooDeepError
        element: Element = super()._start(tag, attr_list)
        self.lines[id(element)] = self.parser.CurrentLineNumber
        return element

    def _end(self, tag: str) -> Element:
        self.depth -= 1
        element: Element = super()._end(tag)
        return element


def local(tag: str) -> str:
    """An element's name without its namespace (1.2 and 2.0 differ only there)."""
    return tag.rsplit("}", 1)[-1]


def parse_xml(data: bytes, source: str) -> tuple[Element, dict[int, int]]:
    """Parse safely; returns the root and the start line of every element (by ``id``)."""
    if len(data) > MAX_BYTES:
        message = f"the file has {len(data):,} bytes; at most {MAX_BYTES:,} are read"
        raise FieldbookError([Issue(1, "", message)], source)
    parser = _LineParser()
    try:
        parser.feed(data)
        root: Element = parser.close()
    except DefusedXmlException as exc:
        line = getattr(parser.parser, "CurrentLineNumber", 1) or 1
        what = type(exc).__name__.replace("Forbidden", "")
        message = (
            f"the file declares {_EXPLAIN.get(what, what)}; survey XML needs none and "
            "it is refused for safety"
        )
        raise FieldbookError([Issue(line, "", message)], source) from None
    except _TooDeepError:
        line = parser.parser.CurrentLineNumber or 1
        message = f"elements nest more than {MAX_DEPTH} deep; survey XML nests about ten"
        raise FieldbookError([Issue(line, "", message)], source) from None
    except ParseError as exc:
        line = exc.position[0] if exc.position else 1
        raise FieldbookError([Issue(line, "", f"not well-formed XML: {exc.msg}")], source) from None
    except (ValueError, RecursionError, MemoryError) as exc:
        raise FieldbookError([Issue(1, "", f"the XML cannot be read: {exc}")], source) from None
    if local(root.tag) != "LandXML":
        message = (
            f"the root element is <{local(root.tag)[:64]}>, not <LandXML>: this is not "
            "a survey XML file"
        )
        raise FieldbookError([Issue(parser.lines.get(id(root), 1), "", message)], source)
    return root, parser.lines


_EXPLAIN = {
    "DTD": "a document type (DTD)",
    "Entities": "an entity",
    "ExternalReference": "a reference to an external file",
}


def _walk(root: Element) -> Iterator[tuple[Element, tuple[Element, ...]]]:
    """Every element with its ancestors, depth first, without recursion."""
    stack: list[tuple[Element, tuple[Element, ...]]] = [(root, ())]
    while stack:
        element, parents = stack.pop()
        yield element, parents
        inner = (*parents, element)
        stack.extend((child, inner) for child in reversed(list(element)))


class _Reader:
    def __init__(self, root: Element, lines: dict[int, int], source: str) -> None:
        self.root, self.lines, self.source = root, lines, source
        self.issues: list[Issue] = []
        self.warnings: list[tuple[int, str]] = []
        self.units = FileUnits()
        self.latlong_factor = math.pi / 180.0
        self.latlong_packed = False
        self.direction_factor = math.pi / 180.0
        self.renamed: set[str | None] = set()

    def line(self, element: Element) -> int:
        return self.lines.get(id(element), 1)

    def where(self, element: Element) -> Source:
        return Source(self.line(element), local(element.tag))

    def error(self, element: Element, message: str) -> None:
        self.issues.append(Issue(self.line(element), "", message))

    # ---- numbers

    def number(self, element: Element, name: str, text: str | None = None) -> float | None:
        raw = element.get(name) if text is None else text
        if raw is None or raw.strip() == "":
            return None
        try:
            value = float(raw)
        except ValueError:
            self.error(element, f"{name}='{raw[:40]}' is not a number")
            return None
        if not math.isfinite(value):
            self.error(element, f"{name}='{raw[:40]}': NaN and infinity are not values")
            return None
        return value

    def length(self, element: Element, name: str, text: str | None = None) -> float | None:
        value = self.number(element, name, text)
        if value is None:
            return None
        metres = value * self.units.length_factor
        if abs(metres) > MAX_LENGTH_M:
            self.error(element, f"{name}={value:g} is larger than 100 000 km; check the unit")
            return None
        return metres

    def angle(self, element: Element, name: str, *, kind: str = "angle") -> float | None:
        factor, packed = self.units.angle_factor, self.units.packed_dms
        if kind == "direction":
            factor = self.direction_factor
        elif kind == "latlong":
            factor, packed = self.latlong_factor, self.latlong_packed
        raw = element.get(name)
        if raw is None or raw.strip() == "":
            return None
        if packed:
            return self.packed(element, name, raw)
        value = self.number(element, name)
        if value is None:
            return None
        radians = value * factor
        if abs(radians) > 4.0 * math.pi:
            self.error(element, f"{name}={raw[:40]} is more than two full circles")
            return None
        return radians

    def packed(self, element: Element, name: str, raw: str) -> float | None:
        """``dd.mmss`` (the standard's "decimal dd.mm.ss") → radians."""
        match = _PACKED_RE.match(raw.strip())
        digits = (match.group(3) or "") if match else ""
        if not match or (digits and len(digits) < 4):
            self.error(element, f"{name}='{raw[:40]}' is not dd.mmss (e.g. 45.3025)")
            return None
        minutes, seconds = int((digits + "00")[:2]), float(f"{digits[2:4]}.{digits[4:] or 0}")
        if minutes >= 60 or seconds >= 60:
            self.error(element, f"{name}='{raw}': minutes and seconds must be below 60")
            return None
        degrees = int(match.group(2)) + minutes / 60.0 + seconds / 3600.0
        if degrees > 720.0:
            self.error(element, f"{name}={raw[:40]} is more than two full circles")
            return None
        return math.radians(-degrees if match.group(1) == "-" else degrees)

    # ---- units and header

    def read_units(self) -> None:
        """The first Metric/Imperial element; without one no value can be read."""
        for element, _ in _walk(self.root):
            if local(element.tag) in ("Metric", "Imperial"):
                self.apply_units(element)
                return
        self.error(
            self.root,
            "the file has no Units element (Metric or Imperial): its lengths and angles "
            "cannot be read without their units",
        )

    def apply_units(self, element: Element) -> None:
        linear = (element.get("linearUnit") or "meter").strip()
        angular = (element.get("angularUnit") or "decimal degrees").strip()
        length = LINEAR_UNITS.get(linear.lower())
        angle = ANGULAR_UNITS.get(angular.lower())
        if length is None:
            names = ", ".join(sorted(LINEAR_UNITS))
            self.error(element, f"linearUnit='{linear[:40]}' is not a length unit ({names})")
            length = (1.0, "m")
        if angle is None:
            names = ", ".join(sorted(ANGULAR_UNITS))
            self.error(element, f"angularUnit='{angular[:40]}' is not an angle unit ({names})")
            angle = (math.pi / 180.0, "deg")
        self.units = FileUnits(
            length[0],
            angle[0],
            angle[1] == "dms" and "dd.mm" in angular,
            length[1],
            angle[1],
            self.where(element),
        )
        self.direction_factor = self.other_unit(element, "directionUnit", angle[0])
        self.latlong_factor = self.other_unit(element, "latLongAngularUnit", angle[0])
        self.latlong_packed = "dd.mm" in (element.get("latLongAngularUnit") or angular)

    def other_unit(self, element: Element, name: str, fallback: float) -> float:
        written = element.get(name)
        if written is None:
            return fallback
        unit = ANGULAR_UNITS.get(written.strip().lower())
        if unit is None:
            self.error(element, f"{name}='{written[:40]}' is not an angle unit")
            return fallback
        return unit[0]

    def read_crs(self) -> tuple[str | None, Source | None]:
        for element, _ in _walk(self.root):
            if local(element.tag) != "CoordinateSystem":
                continue
            code = element.get("epsgCode")
            if code is not None and code.strip().isdigit():
                return f"EPSG:{int(code)}", self.where(element)
            for name in ("name", "projectedCoordinateSystemName", "horizontalCoordinateSystemName"):
                match = _EPSG_RE.match(element.get(name) or "")
                if match:
                    return f"EPSG:{int(match.group(1))}", self.where(element)
            self.warnings.append(
                (
                    self.line(element),
                    "the CoordinateSystem names no EPSG code; no crs line is written",
                )
            )
        return None, None

    def title(self) -> tuple[str | None, Source | None]:
        for element, _ in _walk(self.root):
            if local(element.tag) in ("Project", "SurveyHeader") and element.get("name"):
                return element.get("name"), self.where(element)
        return None, None

    # ---- names

    def name(self, text: str | None, element: Element) -> str:
        """A field book point name; a name that had to change is a warning (once)."""
        cleaned = _name(text)
        if cleaned != text and text not in self.renamed:
            self.renamed.add(text)
            self.warnings.append(
                (
                    self.line(element),
                    f"point name '{(text or '')[:64]}' is written {cleaned} "
                    "(a field book name has no white space, =, # or quotes, at most 64 characters)",
                )
            )
        return cleaned

    def target_name(self, element: Element) -> str | None:
        found = _target_ref(element)
        return None if found is None else self.name(*found)

    # ---- points and instruments

    def points(self) -> list[ControlPoint]:
        points: list[ControlPoint] = []
        for element, _ in _walk(self.root):
            if local(element.tag) == "CgPoint" and element.get("name"):
                point = self.point(element)
                if point is not None:
                    points.append(point)
        return points

    def point(self, element: Element) -> ControlPoint | None:
        name = self.name(element.get("name"), element)
        parts = (element.text or "").split()
        if len(parts) not in (0, 2, 3):
            self.error(
                element,
                f"CgPoint {name}: expected 'northing easting [elevation]', "
                f"found {len(parts)} numbers",
            )
            return None
        values = [self.length(element, "coordinate", part) for part in parts]
        if any(value is None for value in values):
            return None
        north, east, height = (values + [None, None, None])[:3] if values else (None,) * 3
        lat = self.angle(element, "latitude", kind="latlong")
        lon = self.angle(element, "longitude", kind="latlong")
        if height is None:
            height = self.length(element, "elevation")
        control = (element.get("pntSurv") or "").strip().lower() == "control"
        return ControlPoint(
            name,
            self.where(element),
            east=east,
            north=north,
            height=height,
            lat=lat if lon is not None else None,
            lon=lon if lat is not None else None,
            control=control,
            sd_en=self.positive_length(element, "horizontalAccuracy"),
            sd_h=self.positive_length(element, "verticalAccuracy"),
        )

    def positive_length(self, element: Element, name: str) -> float | None:
        value = self.length(element, name)
        if value is not None and value <= 0.0:
            self.error(element, f"{name} must be greater than zero")
            return None
        return value

    def accuracies(self) -> dict[str, Accuracy]:
        found: dict[str, Accuracy] = {}
        for element, _ in _walk(self.root):
            if local(element.tag) != "InstrumentDetails":
                continue
            ppm = self.number(element, "edmAccuracyppm")
            if ppm is not None and ppm < 0.0:
                self.error(element, "edmAccuracyppm must not be negative")
                ppm = None
            name = element.get("id") or element.get("model") or "instrument"
            found[name] = Accuracy(
                name,
                self.where(element),
                direction=self.positive_angle(element, "horizAnglePrecision"),
                zenith=self.positive_angle(element, "zenithAnglePrecision"),
                distance_constant=self.positive_length(element, "edmAccuracyConstant"),
                distance_ppm=ppm,
            )
        return found

    def positive_angle(self, element: Element, name: str) -> float | None:
        value = self.angle(element, name)
        if value is not None and value <= 0.0:
            self.error(element, f"{name} must be greater than zero")
            return None
        return value

    # ---- total station

    def setups(self) -> dict[str, tuple[str, float | None, str]]:
        """InstrumentSetup id → (station name, instrument height, instrumentDetailsID)."""
        found: dict[str, tuple[str, float | None, str]] = {}
        for element, _ in _walk(self.root):
            if local(element.tag) != "InstrumentSetup":
                continue
            station = element.get("stationName")
            for child in element:
                if local(child.tag) == "InstrumentPoint" and child.get("pntRef"):
                    station = child.get("pntRef")
            if not station:
                self.error(
                    element,
                    "InstrumentSetup names no station (stationName or InstrumentPoint pntRef)",
                )
                continue
            setup_id = element.get("id") or f"line {self.line(element)}"
            instrument = element.get("instrumentDetailsID") or ""
            found[setup_id] = (
                self.name(station, element),
                self.length(element, "instrumentHeight"),
                instrument,
            )
        return found

    def target_heights(self) -> dict[str, float | None]:
        return {
            element.get("id") or "": self.length(element, "targetHeight")
            for element, _ in _walk(self.root)
            if local(element.tag) == "TargetSetup"
        }

    def readings(self) -> list[RawReading]:
        setups, heights = self.setups(), self.target_heights()
        readings: list[RawReading] = []
        for element, parents in _walk(self.root):
            if local(element.tag) == "RawObservation":
                reading = self.reading(element, parents, setups, heights)
                if reading is not None:
                    readings.append(reading)
        observed = {(r.setup, r.target) for r in readings}
        for element, parents in _walk(self.root):
            if local(element.tag) == "Backsight" and element.get("circle") is not None:
                reading = self.backsight(element, parents, setups, observed)
                if reading is not None:
                    readings.append(reading)
        readings.sort(key=lambda r: r.source.line)
        return readings

    def setup_of(self, element: Element, parents: tuple[Element, ...]) -> str | None:
        setup_id = element.get("setupID")
        for parent in reversed(parents):
            if setup_id:
                break
            if local(parent.tag) == "ObservationGroup":
                setup_id = parent.get("setupID")
            elif local(parent.tag) == "InstrumentSetup":
                setup_id = parent.get("id") or f"line {self.line(parent)}"
        return setup_id

    def reading(
        self,
        element: Element,
        parents: tuple[Element, ...],
        setups: dict[str, tuple[str, float | None, str]],
        heights: dict[str, float | None],
    ) -> RawReading | None:
        setup_id = self.setup_of(element, parents)
        if setup_id is None or setup_id not in setups:
            self.error(
                element,
                f"RawObservation refers to no InstrumentSetup (setupID='{(setup_id or '')[:40]}')",
            )
            return None
        station, hi, instrument = setups[setup_id]
        target = self.target_name(element)
        if target is None:
            self.error(element, "RawObservation has no TargetPoint (pntRef or name)")
            return None
        hz = self.angle(element, "horizAngle")
        zenith = self.angle(element, "zenithAngle")
        slope = self.length(element, "slopeDistance")
        if zenith is not None and not 0.0 <= zenith <= 2.0 * math.pi:
            self.error(element, "zenithAngle must lie between 0 and 360°")
            return None
        if slope is not None and slope < 0.001:
            self.error(element, "slopeDistance must be at least 1 mm")
            return None
        if hz is None and zenith is None and slope is None:
            kept = [n for n in ("horizDistance", "vertDistance", "azimuth") if element.get(n)]
            what = ", ".join(kept) or "no value"
            self.warnings.append(
                (
                    self.line(element),
                    f"RawObservation with {what} only: not a raw reading, left out",
                )
            )
            return None
        ht = self.length(element, "targetHeight")
        if ht is None:
            ht = heights.get(element.get("targetSetupID") or "")
        set_id = element.get("setID") or _group_set(parents)
        return RawReading(
            setup_id,
            station,
            target,
            self.where(element),
            hz=hz,
            zenith=zenith,
            slope=slope,
            face=self.face(element, zenith),
            set_id=set_id,
            hi=hi,
            ht=ht,
            unused=(element.get("unused") or "").strip().lower() in _TRUE,
            instrument=instrument,
        )

    def face(self, element: Element, zenith: float | None) -> int:
        """directFace when stated; else face II exactly when the zenith passes 180°."""
        written = (element.get("directFace") or "").strip().lower()
        if written in _TRUE:
            return 1
        if written in _FALSE:
            return 2
        if written:
            self.error(element, f"directFace='{written[:20]}' must be true or false")
        return 2 if zenith is not None and zenith > math.pi else 1

    def backsight(
        self,
        element: Element,
        parents: tuple[Element, ...],
        setups: dict[str, tuple[str, float | None, str]],
        observed: set[tuple[str, str]],
    ) -> RawReading | None:
        """A Backsight's circle reading, unless a RawObservation already reads that target."""
        setup_id = self.setup_of(element, parents)
        target = next(
            (
                self.name(c.get("pntRef") or c.get("name"), c)
                for c in element
                if local(c.tag) == "BacksightPoint" and (c.get("pntRef") or c.get("name"))
            ),
            None,
        )
        if setup_id is None or setup_id not in setups or target is None:
            return None
        if (setup_id, target) in observed:
            return None
        station, hi, instrument = setups[setup_id]
        return RawReading(
            setup_id,
            station,
            target,
            self.where(element),
            hz=self.angle(element, "circle"),
            hi=hi,
            ht=self.length(element, "targetHeight"),
            set_id=_group_set(parents),
            instrument=instrument,
        )

    # ---- GNSS

    def vectors(self) -> list[GnssVector]:
        stations: dict[str, str] = {}
        for element, _ in _walk(self.root):
            if local(element.tag) == "GPSSetup" and element.get("id"):
                name = element.get("stationName") or self.target_name(element)
                if name:
                    stations[element.get("id") or ""] = self.name(name, element)
                height = self.length(element, "antennaHeight")
                if height:
                    self.warnings.append(
                        (
                            self.line(element),
                            f"antennaHeight {height:.4f} m "
                            "is taken as applied by the processor: the vectors "
                            "are read mark to mark",
                        )
                    )
        vectors: list[GnssVector] = []
        for element, _ in _walk(self.root):
            if local(element.tag) == "GPSVector":
                vector = self.vector(element, stations)
                if vector is not None:
                    vectors.append(vector)
        return vectors

    def vector(self, element: Element, stations: dict[str, str]) -> GnssVector | None:
        start = stations.get(element.get("setupID_A") or "")
        end = stations.get(element.get("setupID_B") or "")
        if start is None or end is None:
            self.error(
                element,
                "GPSVector: setupID_A and setupID_B must name GPSSetup ids with a stationName",
            )
            return None
        dx, dy, dz = (self.length(element, key) for key in ("dX", "dY", "dZ"))
        if dx is None or dy is None or dz is None:
            if not self.issues or self.issues[-1].line != self.line(element):
                self.error(element, "GPSVector needs dX, dY and dZ")
            return None
        covariance = None
        for child in element:
            if local(child.tag) == "GPSQCInfoLevel2":
                covariance = self.covariance(child)
        return GnssVector(start, end, dx, dy, dz, self.where(element), covariance)

    def covariance(
        self, element: Element
    ) -> tuple[float, float, float, float, float, float] | None:
        names = (
            "covarianceXX",
            "covarianceXY",
            "covarianceXZ",
            "covarianceYY",
            "covarianceYZ",
            "covarianceZZ",
        )
        raw = [self.number(element, name) for name in names]
        if all(value is None for value in raw):
            return None
        if any(value is None for value in raw):
            self.error(element, "GPSQCInfoLevel2 needs all six covariances (XX XY XZ YY YZ ZZ)")
            return None
        square = self.units.length_factor**2
        xx, xy, xz, yy, yz, zz = (value * square for value in raw)  # type: ignore[operator]
        if not _positive_definite(xx, xy, xz, yy, yz, zz):
            self.error(element, "the covariance matrix of this vector is not positive definite")
            return None
        return xx, xy, xz, yy, yz, zz


def _positive_definite(xx: float, xy: float, xz: float, yy: float, yz: float, zz: float) -> bool:
    """Sylvester's criterion: the three leading minors are positive."""
    minor2 = xx * yy - xy * xy
    det = xx * (yy * zz - yz * yz) - xy * (xy * zz - yz * xz) + xz * (xy * yz - yy * xz)
    return xx > 0.0 and minor2 > 0.0 and det > 0.0 and math.isfinite(det)


def _name(text: str | None) -> str:
    """A point name usable in a field book: white space, '=', '#' and '"' become '_'."""
    cleaned = re.sub(r'[\s=#"]', "_", (text or "").strip())[:64]
    return cleaned if cleaned and cleaned.lower() != "end" else f"_{cleaned or 'unnamed'}"


def _target_ref(element: Element) -> tuple[str, Element] | None:
    for child in element:
        if local(child.tag) == "TargetPoint":
            name = child.get("pntRef") or child.get("name")
            if name:
                return name, child
    return None


def _group_set(parents: tuple[Element, ...]) -> str:
    for parent in reversed(parents):
        if local(parent.tag) == "ObservationGroup":
            return parent.get("setID") or parent.get("id") or ""
    return ""


def read_survey_xml(data: bytes, source: str = "") -> SurveyData:
    """The survey XML file ``data`` as records in SI units; every problem → ``FieldbookError``."""
    root, lines = parse_xml(data, source)
    reader = _Reader(root, lines, source)
    reader.read_units()
    crs, crs_source = reader.read_crs()
    points = reader.points()
    accuracies = reader.accuracies()
    readings = reader.readings()
    vectors = reader.vectors()
    if reader.issues:
        raise FieldbookError(
            sorted(reader.issues, key=lambda i: i.line)[:50], source, count=len(reader.issues)
        )
    if not (points or readings or vectors):
        message = "the file holds no CgPoint, RawObservation or GPSVector to import"
        raise FieldbookError([Issue(lines.get(id(root), 1), "", message)], source)
    title, title_source = reader.title()
    return SurveyData(
        title=title,
        title_source=title_source,
        crs=crs,
        crs_source=crs_source,
        units=reader.units,
        points=tuple(points),
        readings=tuple(readings),
        vectors=tuple(vectors),
        accuracies=tuple(accuracies.values()),
        warnings=tuple(reader.warnings),
    )
