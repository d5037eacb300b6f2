"""Test-only: a field book's observations written as survey XML, for import round trips.

Each station's direction round, zenith angles and slope distances become one
``InstrumentSetup`` whose pointings are read in face I and face II with no error (face II
is face I + 180°, zenith 360° − z), so the import's face means give back the book's
values and the book's own accuracies.  Baselines become ``GPSVector`` elements with the
book's 3×3 covariance; held and weighted points become control ``CgPoint`` elements.
Only what the round trip needs is written: one round per station, one accuracy per kind.
"""

from __future__ import annotations

import math
from collections import defaultdict
from xml.sax.saxutils import quoteattr

from server.fieldbook.model import Fieldbook, Observation

#: the book's angle unit → the XML's, and degrees per XML unit
ANGLE_UNITS = {"deg": ("decimal degrees", 1.0), "gon": ("grads", 0.9)}


class _Angles:
    def __init__(self, fieldbook: Fieldbook) -> None:
        if fieldbook.angle_unit not in ANGLE_UNITS:
            raise ValueError(f"the writer handles deg and gon books, not {fieldbook.angle_unit}")
        self.name, self.degrees_per_unit = ANGLE_UNITS[fieldbook.angle_unit]

    def text(self, radians: float, turn: float = 0.0) -> str:
        full = 360.0 / self.degrees_per_unit
        return f"{(math.degrees(radians) / self.degrees_per_unit + turn) % full:.12f}"


def _one(values: list[float], what: str) -> float:
    """The single accuracy a kind has in this book (the writer states one instrument)."""
    if not values:
        return 0.0
    if max(values) - min(values) > 1e-15:
        raise ValueError(f"the {what} accuracies differ between observations")
    return values[0]


def _instrument(fieldbook: Fieldbook, angles: _Angles) -> str:
    by_kind: dict[str, list[Observation]] = defaultdict(list)
    for o in fieldbook.observations:
        by_kind[o.kind].append(o)
    direction = _one([o.sigma.constant for o in by_kind["direction"]], "direction")
    zenith = _one([o.sigma.constant for o in by_kind["zenith"]], "zenith")
    constant = _one([o.sigma.constant for o in by_kind["slope"]], "slope")
    ppm = _one([o.sigma.ppm for o in by_kind["slope"]], "slope ppm")
    return (
        f'<InstrumentDetails id="TS" horizAnglePrecision="{angles.text(direction)}" '
        f'zenithAnglePrecision="{angles.text(zenith)}" edmAccuracyConstant="{constant!r}" '
        f'edmAccuracyppm="{ppm!r}"/>'
    )


def _points(fieldbook: Fieldbook) -> list[str]:
    out = []
    for p in fieldbook.points:
        if p.east is None or p.north is None:
            continue
        height = "" if p.height is None else f" {p.height!r}"
        attributes = f"name={quoteattr(p.name)}"
        if p.fixed == "enh":
            attributes += ' pntSurv="control"'
        elif p.weighted == "enh" and not p.fixed:
            attributes += (
                f' pntSurv="control" horizontalAccuracy="{p.sd_en!r}" verticalAccuracy="{p.sd_h!r}"'
            )
        elif p.fixed or p.weighted:
            raise ValueError(f"the writer holds or weighs all three components, not {p}")
        out.append(f"<CgPoint {attributes}>{p.north!r} {p.east!r}{height}</CgPoint>")
    return out


def _setups(fieldbook: Fieldbook, angles: _Angles) -> list[str]:
    """One setup per station: each target's direction, zenith and slope as a face pair."""
    pointings: dict[str, dict[str, dict[str, float]]] = defaultdict(dict)
    heights: dict[str, float] = {}
    for o in fieldbook.observations:
        if o.kind not in ("direction", "zenith", "slope"):
            continue
        at = o.from_point
        reading = pointings[at].setdefault(o.to, {})
        if o.kind in reading:
            raise ValueError(f"the writer takes one {o.kind} per target at {at}")
        reading[o.kind] = o.value
        if o.instrument_height is not None:
            heights[at] = o.instrument_height
        if o.target_height is not None:
            reading["ht"] = o.target_height
    out = []
    for number, (at, targets) in enumerate(pointings.items(), 1):
        hi = f' instrumentHeight="{heights[at]!r}"' if at in heights else ""
        out.append(f'<InstrumentSetup id="S{number}" stationName={quoteattr(at)}{hi}/>')
        out.append(f'<ObservationGroup id="G{number}" setupID="S{number}" setID="1">')
        for face in (1, 2):
            for target, reading in targets.items():
                out.append(_raw(target, reading, face, angles))
        out.append("</ObservationGroup>")
    return out


def _raw(target: str, reading: dict[str, float], face: int, angles: _Angles) -> str:
    half_turn = 180.0 / angles.degrees_per_unit
    parts = [f'directFace="{"true" if face == 1 else "false"}"']
    if "direction" in reading:
        parts.append(f'horizAngle="{angles.text(reading["direction"], half_turn * (face - 1))}"')
    if "zenith" in reading:
        zenith = reading["zenith"] if face == 1 else 2 * math.pi - reading["zenith"]
        parts.append(f'zenithAngle="{angles.text(zenith)}"')
    if "slope" in reading:
        parts.append(f'slopeDistance="{reading["slope"]!r}"')
    if "ht" in reading:
        parts.append(f'targetHeight="{reading["ht"]!r}"')
    return (
        f"<RawObservation {' '.join(parts)}><TargetPoint pntRef={quoteattr(target)}/>"
        "</RawObservation>"
    )


def _vectors(fieldbook: Fieldbook) -> list[str]:
    out = []
    stations = sorted(
        {p for o in fieldbook.observations if o.kind == "baseline" for p in (o.from_point, o.to)}
    )
    out += [
        f'<GPSSetup id="G{n}" stationName={quoteattr(name)}/>' for n, name in enumerate(stations)
    ]
    number = {name: n for n, name in enumerate(stations)}
    for o in fieldbook.observations:
        if o.kind != "baseline" or o.baseline is None:
            continue
        (dx, dy, dz), c = o.baseline.components, o.baseline.covariance
        out.append(
            f'<GPSVector setupID_A="G{number[o.from_point]}" '
            f'setupID_B="G{number[o.to]}" dX="{dx!r}" dY="{dy!r}" dZ="{dz!r}">'
        )
        out.append(
            f'<GPSQCInfoLevel2 covarianceXX="{c[0][0]!r}" covarianceXY="{c[0][1]!r}" '
            f'covarianceXZ="{c[0][2]!r}" covarianceYY="{c[1][1]!r}" '
            f'covarianceYZ="{c[1][2]!r}" covarianceZZ="{c[2][2]!r}"/>'
        )
        out.append("</GPSVector>")
    return out


def write_survey_xml(fieldbook: Fieldbook) -> bytes:
    """The book's control, rounds, zeniths, slopes and baselines as survey XML 1.2."""
    if fieldbook.length_unit != "m":
        raise ValueError("the writer handles books in metres")
    angles = _Angles(fieldbook)
    epsg = fieldbook.crs.epsg if fieldbook.crs is not None else None
    lines = [
        '<?xml version="1.0" encoding="UTF-8"?>',
        '<LandXML xmlns="http://www.landxml.org/schema/LandXML-1.2" version="1.2">',
        f'<Units><Metric linearUnit="meter" angularUnit="{angles.name}" '
        f'directionUnit="{angles.name}"/></Units>',
    ]
    if epsg is not None:
        lines.append(f'<CoordinateSystem epsgCode="{epsg}"/>')
    lines += ["<CgPoints>", *_points(fieldbook), "</CgPoints>", "<Survey>"]
    if any(o.kind in ("direction", "zenith", "slope") for o in fieldbook.observations):
        lines += ["<Equipment>", _instrument(fieldbook, angles), "</Equipment>"]
    lines += [*_setups(fieldbook, angles), *_vectors(fieldbook), "</Survey>", "</LandXML>"]
    return ("\n".join(lines) + "\n").encode("utf-8")
