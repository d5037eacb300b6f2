"""The geodetic keys of the result JSON: present with a ``crs`` line or the geodetic model, in
the places the contract gives, valid against docs/result.schema.json; absent otherwise."""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import pytest

from server.results.json_writer import json_bytes
from tests.geodetic_result import CRS_LINE, geodetic_result

ROOT = Path(__file__).resolve().parents[1]


def test_geodetic_keys_and_their_places():
    data = geodetic_result().to_json_dict()
    summary = data["summary"]
    assert (summary["model"], summary["crs"], summary["refraction"]) == ("geodetic", CRS_LINE, 0.13)
    keys = list(data)
    assert keys.index("baseline_tests") == keys.index("observations") + 1
    point = data["points"][1]
    names = list(point)
    assert names[names.index("height") + 1 : names.index("height") + 7] == [
        "latitude",
        "longitude",
        "ellipsoidal_height",
        "geoid",
        "scale_factor",
        "convergence",
    ]
    # H = h − N (heights in the file's unit)
    assert point["height"] == pytest.approx(point["ellipsoidal_height"] - point["geoid"])
    baselines = [o for o in data["observations"] if o["kind"] == "baseline"]
    assert [o["component"] for o in baselines] == ["dx", "dy", "dz"] * 2
    assert all("component" not in o for o in data["observations"] if o["kind"] != "baseline")
    assert list(baselines[0])[:3] == ["line", "kind", "component"]
    assert data["baseline_tests"][1] == {
        "line": 13,
        "from": "GN-1",
        "to": "TS<1>&",
        "statistic": 22.4,
        "critical": 16.266,
        "flagged": True,
    }
    # the mixed observation records read back as written
    assert json.loads(json_bytes(data)) == data


def test_plane_result_with_a_crs_line_has_the_keys_with_nulls():
    result = geodetic_result()
    plane = dataclasses.replace(
        result,
        summary=dataclasses.replace(result.summary, model="plane", refraction=None),
        baseline_tests=(),
        points=tuple(dataclasses.replace(p, latitude=None, longitude=None) for p in result.points),
    )
    data = plane.to_json_dict()
    assert data["summary"]["model"] == "plane" and data["summary"]["refraction"] is None
    assert data["baseline_tests"] == []
    assert data["points"][0]["latitude"] is None


def test_plane_result_without_crs_has_no_new_keys():
    result = geodetic_result()
    plain = dataclasses.replace(
        result,
        summary=dataclasses.replace(result.summary, model="plane", crs=None, refraction=None),
    )
    data = plain.to_json_dict()
    assert {"model", "crs", "refraction"}.isdisjoint(data["summary"])
    assert "baseline_tests" not in data
    assert "latitude" not in data["points"][0]
    assert all("component" not in o for o in data["observations"])


def test_geodetic_result_validates_against_the_schema():
    jsonschema = pytest.importorskip("jsonschema")
    schema = json.loads((ROOT / "docs" / "result.schema.json").read_text(encoding="utf-8"))
    validator = jsonschema.Draft202012Validator(schema)
    data = json.loads(json.dumps(geodetic_result().to_json_dict()))
    assert [e.message for e in validator.iter_errors(data)] == []
    data["observations"][0]["component"] = "dq"
    assert list(validator.iter_errors(data))  # a component the contract does not allow


def test_a_stored_geodetic_result_reads_back_equal(tmp_path):
    from server.store.sqlite import Store

    result = geodetic_result()
    store = Store(tmp_path / "stationfit.sqlite3")
    project = store.create_project("dam", "dam.fieldbook", b"title dam\n")
    store.add_run(project, result=result)
    back = Store(tmp_path / "stationfit.sqlite3").latest_run(project).result()
    assert back == result
    assert back.baseline_tests[1].flagged and back.points[1].latitude == result.points[1].latitude
