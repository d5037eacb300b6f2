"""docs/result.schema.json: every demo's result validates, from the command line and from the
JSON API, and documents with a typo'd key, a wrong type or a wrong value do not.

The schema is what scripts outside the project check a result against, so it must accept
every result the program writes (records are closed: a key the program adds must be added
to the schema too) and refuse what the contract does not allow.
"""

from __future__ import annotations

import copy
import json
import subprocess
import sys
import warnings
from pathlib import Path

import pytest

jsonschema = pytest.importorskip("jsonschema")

from server.web import create_app  # noqa: E402 - after the skip for a missing jsonschema
from tests.geodetic_result import geodetic_result  # noqa: E402

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2
    from fastapi.testclient import TestClient

ROOT = Path(__file__).resolve().parent.parent
SCHEMA = json.loads((ROOT / "docs" / "result.schema.json").read_text(encoding="utf-8"))
DEMOS = sorted((ROOT / "demo_projects").glob("*.fieldbook"))
VALIDATOR = jsonschema.Draft202012Validator(SCHEMA)


def _cli_json(demo: Path) -> dict:
    proc = subprocess.run(
        [sys.executable, "-m", "server", "adjust", str(demo), "--json"],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


@pytest.fixture(scope="module")
def cli_results() -> dict[str, dict]:
    return {demo.stem: _cli_json(demo) for demo in DEMOS}


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    with TestClient(create_app(tmp_path_factory.mktemp("data"))) as c:
        yield c


def _errors(document: dict) -> list[str]:
    return [
        "/".join(str(part) for part in error.absolute_path) + ": " + error.message
        for error in VALIDATOR.iter_errors(document)
    ]


def test_the_schema_is_valid_draft_2020_12_with_closed_records():
    jsonschema.Draft202012Validator.check_schema(SCHEMA)
    assert SCHEMA["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert SCHEMA["additionalProperties"] is False
    for name in ("summary", "point", "observation", "misclosure", "relative", "ellipse"):
        assert SCHEMA["$defs"][name]["additionalProperties"] is False


def test_the_demos_cover_every_kind_of_record(cli_results):
    assert len(cli_results) >= 5
    kinds = {o["kind"] for r in cli_results.values() for o in r["observations"]}
    assert kinds >= {"level", "distance", "angle", "direction", "azimuth"}
    assert {m["kind"] for r in cli_results.values() for m in r["misclosures"]} >= {"loop", "run"}
    assert any(r["relative"] for r in cli_results.values())
    assert any(o["ignored"] for r in cli_results.values() for o in r["observations"])
    assert any(p["weighted"] for r in cli_results.values() for p in r["points"])


@pytest.mark.parametrize("demo", DEMOS, ids=lambda p: p.stem)
def test_every_demo_result_from_the_command_line_validates(demo, cli_results):
    assert _errors(cli_results[demo.stem]) == []


@pytest.mark.parametrize("demo", DEMOS, ids=lambda p: p.stem)
def test_every_demo_result_from_the_json_api_validates_and_equals_the_cli(
    demo, client, cli_results
):
    response = client.post("/api/adjust", files={"fieldbook": (demo.name, demo.read_bytes())})
    assert response.status_code == 200
    document = response.json()
    assert _errors(document) == []
    # one result object for every output: only the source name may differ, and it is not in it
    assert document == cli_results[demo.stem]


def test_a_stored_projects_result_validates(client):
    demo = ROOT / "demo_projects" / "leveling_clean.fieldbook"
    response = client.post("/api/projects", files={"fieldbook": (demo.name, demo.read_bytes())})
    assert response.status_code in (200, 201)
    assert _errors(response.json()["result"]) == []


# --------------------------------------------------------------------------- wrong documents


def _mutations() -> list[tuple[str, callable]]:
    def typo_observation(d):
        d["observations"][0]["residul"] = d["observations"][0].pop("residual")

    def extra_top_level(d):
        d["sumary"] = d["summary"]

    def flagged_as_text(d):
        d["observations"][0]["flagged"] = "false"

    def missing_caution(d):
        del d["caution"]

    def fixed_upper_case(d):
        d["points"][0]["fixed"] = "EN"

    def dimension_four(d):
        d["summary"]["dimension"] = 4

    def null_sd(d):
        d["observations"][0]["sd"] = None

    def negative_sd(d):
        d["observations"][0]["sd"] = -0.001

    def unknown_kind(d):
        d["observations"][0]["kind"] = "levelling"

    def confidence_percent(d):
        d["settings"]["confidence"] = 95

    def misclosure_points_as_text(d):
        d["misclosures"][0]["points"] = "BM-1 BM-2"

    def traverse_keys_on_a_loop(d):
        d["misclosures"][0]["ratio"] = 12000.0

    def unknown_precision_method(d):
        d["summary"]["precision_scaling"] = {"method": "posteriori", "factor": 1.0}

    def inseparable_as_names(d):
        d["observations"][0]["inseparable"] = ["KR-106"]

    def line_zero(d):
        d["observations"][0]["line"] = 0

    return [
        (f.__name__, f)
        for f in (
            typo_observation,
            extra_top_level,
            flagged_as_text,
            missing_caution,
            fixed_upper_case,
            dimension_four,
            null_sd,
            negative_sd,
            unknown_kind,
            confidence_percent,
            misclosure_points_as_text,
            traverse_keys_on_a_loop,
            unknown_precision_method,
            inseparable_as_names,
            line_zero,
        )
    ]


@pytest.mark.parametrize("mutation", _mutations(), ids=lambda m: m[0])
def test_a_wrong_document_fails(mutation, cli_results):
    document = copy.deepcopy(cli_results["leveling_blunder"])
    assert _errors(document) == []
    mutation[1](document)
    assert _errors(document), f"{mutation[0]} was accepted"


def test_the_keys_added_this_round_validate_with_their_types(cli_results):
    document = copy.deepcopy(cli_results["closed_traverse"])
    document["summary"]["precision_scaling"] = {"method": "larger", "factor": 1.37}
    for obs in document["observations"]:
        obs["booked"] = obs["observed"]
        obs["estimated_bias"] = None if obs["w"] is None else -obs["residual"] / obs["redundancy"]
        obs["inseparable"] = []
    document["observations"][3]["inseparable"] = [28, 31]
    for pair in document["relative"]:
        pair["requested"] = False
    document["misclosures"].append(
        {
            # a linear misclosure of 0.080 over 2400.00 (1 : 30 000), nine angle stations
            "kind": "traverse",
            "points": ["MON-3", "STA-1", "STA-2", "MON-4"],
            "misclosure": 0.080,
            "length": 2400.0,
            "allowed": 0.24,
            "exceeds": False,
            "angular_misclosure": -12.0,
            "angular_allowed": 30.0,
            "angle_stations": 9,
            "misclosure_east": 0.048,
            "misclosure_north": -0.064,
            "ratio": 30000.0,
            "ratio_allowed": 10000.0,
        }
    )
    assert _errors(document) == []
    # a traverse without a closing orientation and an exact closure: the nulls the contract allows
    document["misclosures"][-1].update(
        angular_misclosure=None,
        angular_allowed=None,
        ratio=None,
        misclosure=0.0,
        misclosure_east=0.0,
        misclosure_north=0.0,
    )
    assert _errors(document) == []
    document["misclosures"][-1]["angle_stations"] = 9.5
    assert _errors(document)


#: Keys arriving in the current release round: in the schema before any result writes them.
ARRIVING = {
    "observation": {"booked", "estimated_bias", "inseparable"},
    "relative": {"requested"},
    "summary": {"precision_scaling"},
    "misclosure": {
        "angular_misclosure",
        "angular_allowed",
        "angle_stations",
        "misclosure_east",
        "misclosure_north",
        "ratio",
        "ratio_allowed",
    },
}


def test_every_key_the_schema_names_is_one_the_program_writes(cli_results):
    """A misspelt optional key in the schema would never match anything; catch it here.

    The geodetic keys come from a hand-made geodetic result until the adjustment writes them;
    the design keys (summary.design, external_reliability) from ``plan`` of the design demo.
    """
    from server.design.plan import plan_fieldbook

    written: dict[str, set[str]] = {name: set() for name in ARRIVING}
    written["point"], written["top"] = set(), set()
    geodetic = json.loads(json.dumps(geodetic_result().to_json_dict()))
    book = ROOT / "demo_projects" / "design" / "footbridge_design.fieldbook"
    design = json.loads(json.dumps(plan_fieldbook(book.read_bytes()).to_json_dict()))
    assert not _errors(design)
    for result in [*cli_results.values(), geodetic, design]:
        written["top"] |= set(result)
        written["summary"] |= set(result["summary"])
        for name, key in (
            ("observation", "observations"),
            ("relative", "relative"),
            ("misclosure", "misclosures"),
            ("point", "points"),
        ):
            for record in result[key]:
                written[name] |= set(record)
    assert set(SCHEMA["properties"]) == written["top"]
    for name in ("summary", "observation", "relative", "misclosure", "point"):
        named = set(SCHEMA["$defs"][name]["properties"])
        assert named - ARRIVING.get(name, set()) <= written[name], name
        assert written[name] <= named, name  # also implied by additionalProperties false
