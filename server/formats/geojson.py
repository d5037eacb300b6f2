"""Exports for drafting and GIS: GeoJSON of points and observation lines.

With a ``crs`` line the geometry is what RFC 7946 (§3.1.1, §4) asks for: longitude,
latitude in decimal degrees and the height above the ellipsoid in metres.  They are on the
datum of the field book's CRS (NAD83, ETRS89, the site grid's GRS80 ...), not transformed to
WGS 84: offline, that would need grids we do not have, and the two differ by up to about
two metres; the collection says so in its foreign member ``coordinate_system``.  Grid
east, north and the orthometric height stay in the properties.

Without a ``crs`` there is no longitude and latitude to give, and RFC 7946 has no place for
grid coordinates (GIS software would read eastings as longitudes and put the survey in the
wrong place without a word), so no GeoJSON is made: ``GeoJsonUnavailable`` says why and what
to do (add a ``crs`` line, or take the points CSV with its grid coordinates).
Points without horizontal coordinates (a height network) have a null
geometry, which RFC 7946 allows for unlocated features.
"""

from __future__ import annotations

import json

from server.results.result import AdjustmentResult, ObservationResult, PointResult
from server.units import LENGTH_FACTORS

Position = list[float]


#: Why a result without a CRS has no GeoJSON (shown on the page and returned by the route).
NO_CRS = (
    "GeoJSON holds longitude and latitude, and this field book has no crs line to give "
    "them: add 'crs EPSG:CODE' (or a site grid, 'crs local lat= lon=') to the field book, "
    "or download the points CSV, which carries the grid coordinates"
)


class GeoJsonUnavailable(ValueError):
    """The result has no CRS, so no longitude and latitude for GeoJSON."""


def _geographic_position(p: PointResult, metres_per_unit: float) -> Position | None:
    """Longitude, latitude and (RFC 7946 §3.1.1) the ellipsoidal height in metres."""
    if p.longitude is None or p.latitude is None:
        return None
    height = p.ellipsoidal_height
    return [p.longitude, p.latitude] + ([] if height is None else [height * metres_per_unit])


def _point_feature(p: PointResult, position: Position | None) -> dict[str, object]:
    geometry: dict[str, object] | None = None
    if position is not None:
        geometry = {"type": "Point", "coordinates": position}
    properties: dict[str, object] = {
        "name": p.name,
        "east": p.east,
        "north": p.north,
        "height": p.height,
        "sd_east": p.sd_east,
        "sd_north": p.sd_north,
        "sd_height": p.sd_height,
        "held_fixed": p.fixed,
        "weighted_control": p.weighted,
        "note": p.note,
        "ellipse_semi_major": p.ellipse.semi_major if p.ellipse else None,
        "ellipse_semi_minor": p.ellipse.semi_minor if p.ellipse else None,
        "ellipse_azimuth_deg": p.ellipse.azimuth if p.ellipse else None,
        "ellipse_confidence": p.ellipse.confidence if p.ellipse else None,
    }
    if p.latitude is not None or p.longitude is not None:
        properties.update(
            latitude=p.latitude,
            longitude=p.longitude,
            ellipsoidal_height=p.ellipsoidal_height,
            geoid=p.geoid,
            scale_factor=p.scale_factor,
            convergence_deg=p.convergence,
        )
    return {
        "type": "Feature",
        "id": f"point:{p.name}",
        "geometry": geometry,
        "properties": properties,
    }


def _line_feature(o: ObservationResult, positions: dict[str, Position]) -> dict[str, object]:
    ends = [o.from_point, o.to] if o.kind != "angle" else [o.from_point, o.at or "", o.to]
    geometry: dict[str, object] | None = None
    if all(name in positions for name in ends):
        geometry = {"type": "LineString", "coordinates": [positions[n][:2] for n in ends]}
    unit = "arcsec" if o.angular else "length unit"
    properties: dict[str, object] = {
        "field_book_line": o.line,
        "kind": o.kind,
        **({} if o.component is None else {"component": o.component}),
        "from": o.from_point,
        "at": o.at,
        "to": o.to,
        "observed": o.observed,
        "booked": o.booked,
        "scale_factor": o.scale_factor,
        "adjusted": o.adjusted,
        "residual": o.residual,
        "residual_unit": unit,
        "standard_deviation": o.sd,
        "redundancy_number": o.redundancy,
        "w_statistic": o.w,
        "minimal_detectable_bias": o.mdb,
        "flagged": o.flagged,
        "left_out": o.ignored,
    }
    return {
        "type": "Feature",
        # a baseline's three components share a line: each keeps an id of its own
        "id": f"line:{o.line}" if o.component is None else f"line:{o.line}:{o.component}",
        "geometry": geometry,
        "properties": properties,
    }


def geojson(result: AdjustmentResult) -> dict[str, object]:
    """A FeatureCollection: one Point per point, one LineString per observation."""
    crs = result.summary.crs
    if not crs:
        raise GeoJsonUnavailable(NO_CRS)
    metres = LENGTH_FACTORS[result.length_unit]
    located = {p.name: _geographic_position(p, metres) for p in result.points}
    positions = {name: xy for name, xy in located.items() if xy is not None}
    features = [_point_feature(p, located[p.name]) for p in result.points]
    features += [_line_feature(o, positions) for o in result.observations]
    system = (
        f"longitude, latitude (decimal degrees) and ellipsoidal height (m) on the "
        f"geodetic datum of {crs}; where that datum is not WGS 84 they are not "
        "transformed to it (the two may differ by up to about 2 m); grid east, north "
        f"and orthometric height in the properties, in {result.length_unit}"
    )
    return {
        "type": "FeatureCollection",
        "coordinate_system": system,
        "title": result.title,
        "features": features,
    }


def geojson_text(result: AdjustmentResult) -> str:
    """GeoJSON as text (no NaN, which JSON forbids); ``GeoJsonUnavailable`` without a CRS."""
    return json.dumps(geojson(result), indent=1, allow_nan=False)
