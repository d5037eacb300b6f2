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
