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
