"""Exports for drafting and GIS: GeoJSON of points and observation lines.

Coordinates are the project's grid eastings and northings in the field
book's length unit, not longitude and latitude: RFC 7946 expects WGS 84, so
the collection says which system it is in (a foreign member
``coordinate_system``) and GIS users assign the project's grid on import.
Points without horizontal coordinates (a height network) have a null
geometry, which RFC 7946 allows for unlocated features.
"""

from __future__ import annotations

import json

from server.results.result import AdjustmentResult, ObservationResult, PointResult


def _point_feature(p: PointResult) -> dict[str, object]:
    located = p.east is not None and p.north is not None
    geometry: dict[str, object] | None = None
    if located:
        coordinates = [p.east, p.north] + ([p.height] if p.height is not None else [])
        geometry = {"type": "Point", "coordinates": coordinates}
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
    return {
        "type": "Feature",
        "id": f"point:{p.name}",
        "geometry": geometry,
        "properties": properties,
    }


def _line_feature(
    o: ObservationResult, positions: dict[str, tuple[float, float]]
) -> dict[str, object]:
    ends = [o.from_point, o.to] if o.kind != "angle" else [o.from_point, o.at or "", o.to]
    geometry: dict[str, object] | None = None
    if all(name in positions for name in ends):
        geometry = {"type": "LineString", "coordinates": [list(positions[n]) for n in ends]}
    unit = "arcsec" if o.angular else "length unit"
    properties: dict[str, object] = {
        "field_book_line": o.line,
        "kind": o.kind,
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
        "id": f"line:{o.line}",
        "geometry": geometry,
        "properties": properties,
    }


def geojson(result: AdjustmentResult) -> dict[str, object]:
    """A FeatureCollection: one Point per point, one LineString per observation."""
    positions = {
        p.name: (p.east, p.north)
        for p in result.points
        if p.east is not None and p.north is not None
    }
    features = [_point_feature(p) for p in result.points]
    features += [_line_feature(o, positions) for o in result.observations]
    return {
        "type": "FeatureCollection",
        "coordinate_system": f"project grid: east, north (and height) in {result.length_unit}; not WGS 84",
        "title": result.title,
        "features": features,
    }


def geojson_text(result: AdjustmentResult) -> str:
    """GeoJSON as text (no NaN, which JSON forbids)."""
    return json.dumps(geojson(result), indent=1, allow_nan=False)
