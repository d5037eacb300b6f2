"""The geodetic model's frame: the CRS refused on its line, undulations, start positions."""

from __future__ import annotations

import numpy as np
import pytest
from test_fieldbook_geodetic import HARBOR_HILL, parse

from server.errors import FieldbookError, NetworkError
from server.model.geodetic import geodetic_frame, is_geodetic, undulations


def test_start_positions_close_the_booked_baselines():
    """Start values come from the control and the baselines chained out of it: each vector
    between two marks the start values place must agree with the booked one within the
    few millimetres of noise the invented job carries."""
    book = parse(HARBOR_HILL)
    frame = geodetic_frame(book)
    for obs in book.observations:
        assert obs.baseline is not None
        vector = np.subtract(frame.start[obs.to], frame.start[obs.from_point])
        assert np.allclose(vector, obs.baseline.components, atol=0.02), obs.line
    assert frame.methods["K-7"].startswith("baseline")
    assert frame.refraction == pytest.approx(0.13)  # the default k: common practice


def test_undulations_come_from_the_point_else_the_file_else_zero():
    book = parse(HARBOR_HILL.replace("point CEDAR lat", "point CEDAR geoid=-23.50m lat"))
    und = undulations(book)
    assert und["CEDAR"] == pytest.approx(-23.50)
    assert und["K-7"] == pytest.approx(-23.84)
    plain = parse(HARBOR_HILL.replace("geoid undulation=-23.84m\n", ""))
    assert set(undulations(plain).values()) == {0.0}


def test_a_geographic_crs_is_refused_on_its_line():
    text = HARBOR_HILL.replace(
        "crs local lat=47:03:00 lon=-122:53:30 east=5000m north=5000m", "crs EPSG:4326"
    )
    book = parse(text)
    with pytest.raises(FieldbookError) as caught:
        geodetic_frame(book)
    issue = caught.value.issues[0]
    assert issue.line == 4
    assert "EPSG:4326" in issue.message


def test_a_point_nothing_reaches_is_named():
    text = HARBOR_HILL + "slope K-7 LONELY 120.55 sd=3mm hi=1.5m ht=1.6m\n"
    book = parse(text)
    assert is_geodetic(book)
    with pytest.raises(NetworkError) as caught:
        geodetic_frame(book)
    assert caught.value.points == ("LONELY",)
    assert "LONELY" in str(caught.value)


def test_given_points_converted_together_each_land_on_their_own_pyproj_position():
    """Grid and latitude/longitude points interleaved (converted in one pyproj call per
    form): each start position must be its own, as PROJ converts it point by point (site
    grid ``tmerc`` inverse to GRS80 latitude and longitude, then ``cart``)."""
    from pyproj import Transformer

    grid_points = {"PIER": (5210.331, 4875.912, 12.5), "MILL": (4620.044, 5391.207, 88.25)}
    extra = "".join(
        f"point {name} east={e} north={n} height={h}\n" for name, (e, n, h) in grid_points.items()
    )
    text = HARBOR_HILL.replace("point CEDAR", extra.split("\n")[0] + "\npoint CEDAR")
    text = text.replace("point FERRY", extra.split("\n")[1] + "\npoint FERRY")
    text += "baseline RIDGE PIER +100.0 +50.0 +20.0\nbaseline CEDAR MILL -80.0 +30.0 +10.0\n"
    frame = geodetic_frame(parse(text))
    site = (
        "+proj=tmerc +lat_0=47.05 +lon_0=-122.891666666666667 +k=1 +x_0=5000 +y_0=5000 +ellps=GRS80"
    )
    to_lonlat = Transformer.from_pipeline(
        f"+proj=pipeline +step +inv {site} +step +proj=unitconvert +xy_in=rad +xy_out=deg"
    )
    cart = Transformer.from_pipeline(
        "+proj=pipeline +step +proj=unitconvert +xy_in=deg +xy_out=rad "
        "+step +proj=cart +ellps=GRS80"
    )
    for name, (east, north, height) in grid_points.items():
        lon, lat = to_lonlat.transform(east, north)
        expected = cart.transform(lon, lat, height - 23.84)
        assert frame.start[name] == pytest.approx(expected, abs=1e-6), name
        assert frame.methods[name] == "given"
    # RIDGE 47°03′12.48731″ N, 122°54′08.11902″ W, h = 142.318 − 23.84
    lat = 47 + 3 / 60 + 12.48731 / 3600
    lon = -(122 + 54 / 60 + 8.11902 / 3600)
    assert frame.start["RIDGE"] == pytest.approx(
        cart.transform(lon, lat, 142.318 - 23.84), abs=1e-6
    )


def test_a_given_point_the_grid_cannot_place_is_named():
    text = HARBOR_HILL.replace(
        "point CEDAR", "point FAR east=30000000 north=5000 height=10\npoint CEDAR"
    )
    with pytest.raises(NetworkError) as caught:
        geodetic_frame(parse(text + "baseline RIDGE FAR +1.0 +1.0 +1.0\n"))
    assert caught.value.points == ("FAR",)
    assert "point FAR (line 11) lies where the CRS" in str(caught.value)


def _start_observations_from_objects(book, crs, known):
    """The former reading of ``_start_observations``, one ``Observation`` object at a time:
    the reference the column reading must give exactly (a regression check)."""
    from server.geodesy import start3d
    from server.model.geodetic import _rough_factors

    convergence, scale = _rough_factors(crs, known)
    by_round: dict[int, list] = {}
    out: list = []
    for obs in book.observations:
        if obs.ignored or obs.planned:
            continue
        hi, ht = obs.instrument_height or 0.0, obs.target_height or 0.0
        if obs.kind == "direction":
            if obs.round_line is not None:
                by_round.setdefault(obs.round_line, []).append(obs)
        elif obs.kind == "slope":
            out.append(start3d.SlopeDistance(obs.from_point, obs.to, obs.value, hi, ht))
        elif obs.kind == "zenith":
            out.append(
                start3d.ZenithAngle(obs.from_point, obs.to, obs.value, hi, ht, book.refraction)
            )
        elif obs.kind == "baseline":
            out.append(start3d.Baseline(obs.from_point, obs.to, *obs.baseline.components))
        elif obs.kind == "level":
            out.append(start3d.HeightDifference(obs.from_point, obs.to, obs.value))
        elif obs.kind == "distance":
            out.append(start3d.GridDistance(obs.from_point, obs.to, obs.value, scale))
        elif obs.kind == "azimuth":
            out.append(start3d.Azimuth(obs.from_point, obs.to, obs.value, convergence))
        elif obs.kind == "angle":
            out.append(start3d.HorizontalAngle(obs.at, obs.from_point, obs.to, obs.value))
    for line in sorted(by_round):
        entries = by_round[line]
        out.append(
            start3d.DirectionRound(entries[0].from_point, tuple((o.to, o.value) for o in entries))
        )
    return out


def test_the_start_value_inputs_read_from_columns_are_those_of_the_objects():
    """Every kind, heights absent, zero and negative zero, ignored and planned lines, two
    rounds: the column reading gives the very objects (and bits) the object reading gave."""
    from server.geodesy.crs import crs_from_epsg
    from server.model.geodetic import _given_points, _start_observations

    text = (
        "crs EPSG:32633\ndefaults level=1mm/sqrtkm distance=2mm+2ppm angle=1sec azimuth=2sec "
        "direction=1sec slope=2mm zenith=1sec baseline=3mm\n"
        "point A east=500000 north=4982900 height=100 fix\n"
        "point B east=500100 north=4982950 height=101 fix\n"
        "level A C 1.25 len=0.4km\nlevel C B ? len=0.4km\ndistance A C 60.1\n"
        "angle A B C 31:00:00\nazimuth A C 45:00:00\nazimuth B C 12:00:00 ignore\n"
        "slope A C 60.2 hi=1.5m ht=0m\nslope B C 61.0 hi=-0m ht=1.7m\nslope C A ?\n"
        "zenith A C 89:00:00 hi=1.5m\nzenith C B 91:00:00\n"
        "baseline A B 100.0 50.0 1.0\nbaseline A C 1 2 3 ignore\n"
        "directions A\n  B 0:00:00\n  C 40:00:00\nend\n"
        "directions B\n  C 0:00:00\n  A ?\n  A 180:00:00\nend\n"
    )
    book = parse(text)
    crs = crs_from_epsg("EPSG:32633")
    known, _ = _given_points(book.points, crs, undulations(book))
    found = _start_observations(book, crs, known)
    reference = _start_observations_from_objects(book, crs, known)
    assert found == reference
    for a, b in zip(found, reference, strict=True):  # equal floats, and equal bits
        assert repr(a) == repr(b)
    assert {type(o).__name__ for o in found} >= {"SlopeDistance", "DirectionRound", "Azimuth"}
