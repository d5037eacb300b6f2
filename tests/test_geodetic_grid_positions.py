"""Points given by latitude and longitude get their grid east and north in one pyproj call."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
from geographiclib.geodesic import Geodesic
from test_fieldbook_geodetic import HARBOR_HILL, parse

from server.fieldbook.model import PointStatement
from server.model.geodetic import resolve_crs, with_grid_positions
from server.model.network import NetworkPoint


def _mark(name: str) -> NetworkPoint:
    return NetworkPoint(name, None, None, None, "", "", None, None, None, True)


def test_one_call_gives_each_point_the_numbers_of_a_call_of_its_own():
    """Bit for bit against the conversion point by point (the former way), on 300 random
    marks around the site, with marks not given by latitude/longitude left as they are."""
    book = parse(HARBOR_HILL)
    crs = resolve_crs(book)
    assert crs is not None
    rng = np.random.default_rng(16)
    lat0, lon0 = math.radians(47.05), math.radians(-122.891667)
    lats = lat0 + rng.uniform(-0.002, 0.002, 300)
    lons = lon0 + rng.uniform(-0.003, 0.003, 300)
    statements = [
        PointStatement(line=100 + k, name=f"R{k}", latitude=lat, longitude=lon)
        for k, (lat, lon) in enumerate(zip(lats.tolist(), lons.tolist()))
    ]
    grid_given = PointStatement(line=99, name="G", east=5000.0, north=5000.0)
    book = replace(book, points=(grid_given, *statements))
    marks = [_mark("G"), *(_mark(p.name) for p in statements), _mark("UNDECLARED")]
    placed = with_grid_positions(marks, book, crs)
    assert placed[0] is marks[0] and placed[-1] is marks[-1]
    per_unit = crs.metres_per_unit
    for mark, stmt in zip(placed[1:-1], statements, strict=True):
        east, north = crs.geodetic_to_grid(np.array([stmt.latitude]), np.array([stmt.longitude]))
        assert mark.east == float(east[0]) * per_unit  # exactly
        assert mark.north == float(north[0]) * per_unit


def test_a_mark_on_the_central_meridian_lies_a_meridian_arc_north_of_the_origin():
    """Independent check: on the site grid's central meridian (scale 1) the grid east is the
    false easting and the grid north the false northing plus the meridian arc from the
    origin's latitude, here the GRS80 geodesic along the meridian from geographiclib."""
    book = parse(HARBOR_HILL)  # crs local lat=47:03:00 lon=-122:53:30 east=5000 north=5000
    crs = resolve_crs(book)
    assert crs is not None
    lat0, lon0 = 47.05, -(122 + 53.5 / 60)
    marks = []
    for k, dlat in enumerate((-0.03, -0.004, 0.0, 0.011, 0.05)):
        marks.append(
            PointStatement(
                line=100 + k,
                name=f"M{k}",
                latitude=math.radians(lat0 + dlat),
                longitude=math.radians(lon0),
            )
        )
    book = replace(book, points=tuple(marks))
    placed = with_grid_positions([_mark(p.name) for p in marks], book, crs)
    grs80 = Geodesic(6378137.0, 1 / 298.257222101)  # GRS80 (published defining constants)
    for mark, dlat in zip(placed, (-0.03, -0.004, 0.0, 0.011, 0.05), strict=True):
        arc = grs80.Inverse(lat0, lon0, lat0 + dlat, lon0)["s12"]
        assert abs(mark.east - 5000.0) < 1e-6
        assert abs(mark.north - (5000.0 + math.copysign(arc, dlat))) < 1e-6
