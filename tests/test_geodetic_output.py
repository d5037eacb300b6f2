"""What a surveyor looks for in the outputs of a geodetic result: the CRS, refraction, geoid
source and the deflection assumption; geodetic coordinates with their units; baseline
components and the baseline tests; baselines drawn apart from terrestrial lines; GeoJSON
in longitude/latitude.  Results are hand-made (``tests/geodetic_result.py``)."""

from __future__ import annotations

import csv
import dataclasses
import io
import json
import re
import warnings

import pypdf
import pytest

from server.formats.geojson import GeoJsonUnavailable, geojson
from server.report import html as html_report
from server.report import plot
from server.report.csv_export import POINT_CSV_HEADER, points_csv
from server.report.pdf import report_pdf
from server.report.text import report_text
from server.web import create_app
from tests.geodetic_result import CRS_LINE, GEOID, geodetic_result

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2
    from fastapi.testclient import TestClient


@pytest.fixture(scope="module")
def result():
    return geodetic_result()


def _plane(result):
    """The same result as a plane result without a crs line."""
    return dataclasses.replace(
        result,
        baseline_tests=(),
        summary=dataclasses.replace(result.summary, model="plane", crs=None, refraction=None),
    )


def _check_page(text: str, result) -> None:
    """The geodetic facts every human-readable output must state."""
    assert CRS_LINE in text
    assert "Refraction coefficient k" in text and "0.13" in text
    assert "undulations N from the field book" in text
    assert "deflections of the vertical taken as zero" in text
    lat = result.points[1].latitude
    assert f"{lat:.9f}" in text  # decimal degrees to 9 places
    assert f"{result.points[1].scale_factor:.9f}" in text
    assert f"{GEOID:.4f}" in text
    assert "baseline dy" in text
    assert "Baseline tests" in text and "22.40" in text and "16.27" in text


def test_html_report_states_model_coordinates_and_baseline_tests(result):
    html = html_report.report_html(result)
    _check_page(html, result)
    assert "Latitude (°)" in html and "Ellipsoidal height h (m)" in html
    assert "south and west negative" in html and "true north" in html
    row = re.search(r'<tr class="is-flagged"><td class="num">13</td>.*?</tr>', html, re.S)
    assert row is not None and "⚑ flagged" in row.group(0)
    # the point name with markup characters is escaped everywhere
    assert "TS<1>&" not in html and "TS&lt;1&gt;&amp;" in html


def test_plane_report_without_crs_has_no_geodetic_parts(result):
    html = html_report.report_html(_plane(result))
    for words in (
        "Geodetic model",
        "Geodetic coordinates",
        "Baseline tests",
        "deflections of the vertical",
    ):
        assert words not in html


def test_text_report_states_the_same(result):
    text = report_text(result)
    _check_page(text, result)
    assert "latitude °" in text and "h m" in text
    assert "Geodetic model" not in report_text(_plane(result)).split("Points")[0]


def test_csv_has_geodetic_columns_only_with_a_crs(result):
    rows = list(csv.DictReader(io.StringIO(points_csv(result))))
    assert list(rows[0])[:10] == [
        "name",
        "east",
        "north",
        "height",
        "latitude",
        "longitude",
        "ellipsoidal_height",
        "geoid",
        "scale_factor",
        "convergence",
    ]
    for row, p in zip(rows, result.points, strict=True):
        assert float(row["latitude"]) == pytest.approx(p.latitude, abs=5e-10)
        assert float(row["longitude"]) == pytest.approx(p.longitude, abs=5e-10)
        assert float(row["ellipsoidal_height"]) - float(row["geoid"]) == pytest.approx(
            float(row["height"]), abs=2e-4
        )
    assert rows[2]["name"] == "TS<1>&"
    plain = next(csv.reader(io.StringIO(points_csv(_plane(result)))))
    assert tuple(plain) == POINT_CSV_HEADER


def test_pdf_states_the_same(result):
    pdf = report_pdf(result)
    reader = pypdf.PdfReader(io.BytesIO(pdf))
    text = re.sub(r"\s+", " ", " ".join(page.extract_text() for page in reader.pages))
    assert CRS_LINE in text
    assert "deflections of the vertical taken as zero" in text
    assert "Geodetic coordinates" in text and f"{result.points[1].latitude:.9f}" in text
    assert "Baseline tests" in text and "22.40" in text
    assert "GNSS baseline" in text  # the plot's legend
    assert "from true north" in text


def test_plot_draws_baselines_apart_from_terrestrial_lines(result):
    data = plot.network_plot_data(result)
    styles = {frozenset((ln["a"], ln["b"])): ln["style"] for ln in data["lines"]}
    names = [p["name"] for p in data["points"]]
    index = {name: k for k, name in enumerate(names)}
    assert styles[frozenset((index["GN-1"], index["GN-2"]))] == "baseline"
    assert styles[frozenset((index["TS<1>&"], index["GN-2"]))] == "distance"  # the slope
    assert data["present"]["baseline"] and data["present"]["distance"]
    html = html_report.report_html(result)
    assert 'class="np-ln np-ln-baseline' in html and "GNSS baseline" in html
    baseline_line = re.search(r'np-ln np-ln-baseline".*?</g>', html, re.S)
    assert baseline_line is not None and 'stroke-dasharray="11 3"' in baseline_line.group(0)


def test_geojson_is_longitude_latitude_with_a_crs(result):
    data = json.loads(json.dumps(geojson(result), allow_nan=False))
    assert "longitude, latitude" in data["coordinate_system"]
    assert CRS_LINE in data["coordinate_system"]
    points = {f["properties"]["name"]: f for f in data["features"] if f["id"].startswith("point:")}
    for p in result.points:
        lon, lat, h = points[p.name]["geometry"]["coordinates"]
        assert (lon, lat) == (p.longitude, p.latitude)  # RFC 7946: longitude first
        assert -180 <= lon <= 180 and -90 <= lat <= 90
        assert h == pytest.approx(p.ellipsoidal_height)  # metres above the ellipsoid
        assert points[p.name]["properties"]["east"] == p.east
    ids = [f["id"] for f in data["features"]]
    assert len(ids) == len(set(ids))  # a baseline's components are three features, three ids
    line = next(f for f in data["features"] if f["id"] == "line:12:dx")
    assert line["properties"]["component"] == "dx"
    assert line["geometry"]["coordinates"][0] == [
        result.points[0].longitude,
        result.points[0].latitude,
    ]


def test_geojson_heights_in_metres_from_a_feet_book(result):
    feet = dataclasses.replace(result, length_unit="ft")
    coordinates = geojson(feet)["features"][1]["geometry"]["coordinates"]
    assert coordinates[2] == pytest.approx(result.points[1].ellipsoidal_height * 0.3048)


def test_geojson_without_crs_is_refused_rather_than_passed_off_as_geographic(result):
    """RFC 7946 positions are longitude and latitude; grid eastings would be read as such."""
    plane = _plane(
        dataclasses.replace(
            result,
            points=tuple(
                dataclasses.replace(p, latitude=None, longitude=None) for p in result.points
            ),
        )
    )
    with pytest.raises(GeoJsonUnavailable, match="crs"):
        geojson(plane)


def test_results_page_shows_the_geodetic_parts(result, tmp_path, monkeypatch):
    """The real route and template, with the stored result swapped for the geodetic one."""
    from server.web import pages

    # swapped before the upload: the adjusting thread makes the page's parts from it
    monkeypatch.setattr(pages.service, "result_with_presets", lambda *args, **kwargs: result)
    with TestClient(create_app(tmp_path / "data")) as client:
        response = client.post("/demos/leveling_clean", follow_redirects=False)
        url = response.headers["location"]
        html = client.get(url).text
    _check_page(html, result)
    assert 'id="geodetic-points"' in html and 'id="baseline-tests"' in html
    assert "TS<1>&" not in html and "TS&lt;1&gt;&amp;" in html


def test_verdict_names_a_flagged_baseline_line_once_with_its_components(result):
    from server.report.tables import flagged_lines, verdict

    two = dataclasses.replace(
        result,
        observations=tuple(
            dataclasses.replace(o, flagged=True) if (o.line, o.component) == (13, "dz") else o
            for o in result.observations
        ),
    )
    note = " ".join(verdict(two).notes)
    assert "2 observations flagged" in note and "line 13 (dy, dz)." in note
    assert flagged_lines(two) == [13]


def test_plot_detail_panel_gives_latitude_and_longitude(result):
    data = plot.network_plot_data(result)
    detail = dict(map(tuple, data["points"][1]["detail"]))
    assert detail["Latitude"] == f"{result.points[1].latitude:.9f}°"
    assert detail["Longitude"] == f"{result.points[1].longitude:.9f}°"
