"""A result's points and observations kept as columns (``server/results/columns.py``).

The rows read from the columns, and the JSON records written straight from them, must be
what the row-by-row path gives: ``to_json_dict`` of the same result with its rows made
into a plain tuple is the reference (that path writes each row's fields one by one, and
the golden files hold it to the output of the builder before the columns).
"""

from __future__ import annotations

import dataclasses
import json
import math
import sys
from pathlib import Path

import numpy as np
import pytest

from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_fieldbook, adjust_parsed
from server.results import builder, json_result
from server.results import columns as columns_module
from server.results.columns import ObservationColumns, PointColumns, RelativeColumns
from server.results.json_result import result_json_chunks
from server.results.json_writer import json_bytes
from server.review.snooping import with_ignored

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "bench"))
import networks  # noqa: E402 - bench/networks.py: the benchmark field books

PLANE_DEMOS = [
    "closed_traverse",
    "control_network",
    "leveling_blunder",
    "leveling_clean",
    "network_direction_blunder",
]


def _as_rows(result):
    return dataclasses.replace(
        result,
        points=tuple(result.points),
        observations=tuple(result.observations),
        relative=tuple(result.relative),
    )


def _demo(name: str):
    return adjust_fieldbook((ROOT / "demo_projects" / f"{name}.fieldbook").read_bytes())


@pytest.mark.parametrize("name", PLANE_DEMOS)
def test_json_from_columns_is_the_json_of_the_rows(name):
    result = _demo(name)
    assert isinstance(result.points, PointColumns)
    assert isinstance(result.observations, ObservationColumns)
    assert isinstance(result.relative, RelativeColumns)
    from_columns = result.to_json_dict()
    from_rows = _as_rows(result).to_json_dict()
    assert from_columns == from_rows
    assert json_bytes(from_columns) == json_bytes(from_rows)


def test_ignored_observations_read_alike_from_columns_and_rows():
    fieldbook = parse_fieldbook(networks.horizontal(40, seed=3))
    lines = [o.line for o in fieldbook.observations][5:60:7]
    result = adjust_parsed(with_ignored(fieldbook, set(lines)))
    ignored = [o for o in result.observations if o.ignored]
    assert [o.line for o in ignored] == lines
    # left out: no redundancy, no test, a value computed from the adjusted coordinates
    assert all(o.redundancy is None and o.w is None and o.adjusted is not None for o in ignored)
    assert result.to_json_dict() == _as_rows(result).to_json_dict()


def test_relative_ellipses_with_a_tolerance_and_requested_pairs_read_alike():
    text = networks.horizontal(40, seed=5)  # with a relative tolerance
    assert "tolerance relative=" in text
    result = adjust_fieldbook(text + "relative P0_1 P4_3\nrelative P0_0 P5_5\n")
    relative = result.relative
    assert isinstance(relative, RelativeColumns) and len(relative) > 10
    assert any(r.requested for r in relative) and any(r.held for r in relative)
    # two held points: no allowance, no verdict; every other pair checked
    assert all((r.allowed is None) == r.held == (r.passed is None) for r in relative)
    assert result.to_json_dict() == _as_rows(result).to_json_dict()


def test_rows_by_index_slice_and_iteration(monkeypatch):
    monkeypatch.setattr(columns_module, "CHUNK", 7)  # iteration crosses chunk boundaries
    result = adjust_fieldbook(networks.leveling(60))
    observations = result.observations
    rows = tuple(observations)
    assert len(rows) == len(observations) > 7 * 3
    assert observations[0] == rows[0] and observations[-1] == rows[-1]
    assert observations[10:25] == rows[10:25] and isinstance(observations[10:25], tuple)
    assert observations[::5] == rows[::5]
    assert observations[5:2] == ()
    with pytest.raises(IndexError):
        observations[len(rows)]
    assert observations == rows and rows == tuple(observations)
    assert observations != rows[:-1]
    assert hash(observations) == hash(rows)
    points = result.points
    assert tuple(points)[3] == points[3] and points.index(points[3]) == 3
    # equal results compare equal, and a result keeps its rows through the store's form
    assert adjust_fieldbook(networks.leveling(60)) == result
    detail = result.detail_dict()
    assert detail["observations"][4]["line"] == rows[4].line
    json.dumps(detail)  # plain data


def test_nan_in_a_reported_value_is_refused_and_in_an_absent_one_is_null():
    result = _demo("leveling_clean")
    columns = result.observations
    assert isinstance(columns, ObservationColumns)
    # w of an observation without a test is absent (null) whatever the array holds there
    tested = columns.tested.copy()
    tested[0] = False
    absent = dataclasses.replace(result, observations=dataclasses.replace(columns, tested=tested))
    assert json.loads(json_bytes(absent.to_json_dict()))["observations"][0]["w"] is None
    # a NaN where a value is reported cannot be written as JSON
    sd = columns.sd.copy()
    sd[2] = math.nan
    broken = dataclasses.replace(result, observations=dataclasses.replace(columns, sd=sd))
    with pytest.raises(ValueError, match="not JSON compliant"):
        json_bytes(broken.to_json_dict())
    points = result.points
    assert isinstance(points, PointColumns)
    coordinates = points.coordinates.copy()
    coordinates[0, 2] = np.inf
    bad = dataclasses.replace(result, points=dataclasses.replace(points, coordinates=coordinates))
    with pytest.raises(ValueError, match="not JSON compliant"):
        json_bytes(bad.to_json_dict())


@pytest.mark.parametrize("name", [*PLANE_DEMOS, "dam_control_3d"])
def test_json_written_in_chunks_is_the_json_of_the_dict(name, monkeypatch):
    monkeypatch.setattr(columns_module, "CHUNK", 3)
    monkeypatch.setattr(json_result, "CHUNK", 3)  # the records cross chunk boundaries
    result = _demo(name)
    assert b"".join(result_json_chunks(result)) == json_bytes(result.to_json_dict())


def test_a_large_result_in_chunks_and_a_nan_in_it_refused(monkeypatch):
    monkeypatch.setattr(json_result, "CHUNK", 1000)
    result = adjust_fieldbook(networks.leveling(3_000))
    pieces = list(result_json_chunks(result))
    assert len(pieces) > 6  # written in parts, not as one document
    assert b"".join(pieces) == json_bytes(result.to_json_dict())
    columns = result.observations
    assert isinstance(columns, ObservationColumns)
    residual = columns.residual.copy()
    residual[-1] = math.nan
    broken = dataclasses.replace(
        result, observations=dataclasses.replace(columns, residual=residual)
    )
    with pytest.raises(ValueError, match="not JSON compliant"):
        b"".join(result_json_chunks(broken))


def _row_by_row(columns, entries):
    """The reference: each baseline's entries in its place among the rows made one by one."""
    return tuple(row for k, made in enumerate(columns) for row in entries.get(k, (made,)))


@pytest.mark.parametrize("ignored", [False, True])
def test_baseline_entries_kept_as_columns_read_as_the_rows_did(ignored, monkeypatch):
    fieldbook = parse_fieldbook(networks.geodetic(30))
    lines = [o.line for o in fieldbook.observations if o.kind == "baseline"]
    assert len(lines) > 5
    if ignored:  # ignored baselines and other ignored lines: no statistics for them
        fieldbook = with_ignored(fieldbook, {lines[2], lines[5], fieldbook.observations[5].line})
    result = adjust_parsed(fieldbook)
    observations = result.observations
    assert isinstance(observations, ObservationColumns)
    components = [o.component for o in observations if o.kind == "baseline"]
    assert components == ["dx", "dy", "dz"] * len(lines)
    monkeypatch.setattr(builder, "with_entries", _row_by_row)
    reference = adjust_parsed(fieldbook)
    assert not isinstance(reference.observations, ObservationColumns)
    assert tuple(observations) == reference.observations
    assert result == reference
    from_columns, from_rows = result.to_json_dict(), reference.to_json_dict()
    assert json_bytes(from_columns) == json_bytes(from_rows)


#: leveling_clean with a spur section to a new mark: a used observation no test can check
_SPUR = "level BM-ORCHARD SPUR-1 0.4321 len=0.12km\n"


@pytest.mark.parametrize("name", [*PLANE_DEMOS, "dam_control_3d_blunder", "spur"])
def test_what_the_store_keeps_is_what_asdict_and_the_rows_give(name):
    # the run's detail (plain_dict) and its flagged and untested counts are read from the
    # columns; the reference is dataclasses.asdict and the count over the rows
    from server.store.sqlite import _counts

    if name == "spur":
        text = (ROOT / "demo_projects" / "leveling_clean.fieldbook").read_text() + _SPUR
        result = adjust_fieldbook(text.encode())
        assert sum(1 for o in result.observations if o.redundancy is not None and o.w is None)
    else:
        result = _demo(name)
    rows = _as_rows(result)
    # repr: the same values (NaN too), the same container types (tuples stay tuples)
    assert repr(result.detail_dict()) == repr(dataclasses.asdict(rows))
    flagged = sum(1 for o in rows.observations if o.flagged)
    untested = sum(
        1 for o in rows.observations if not o.ignored and o.redundancy is not None and o.w is None
    )
    assert _counts(result.observations) == _counts(rows.observations) == (flagged, untested)


def test_a_stored_document_reads_back_to_the_same_values_nan_included():
    # orjson packs what JSON can spell; a NaN (which orjson would write as null) goes
    # through the standard library and still reads back as NaN, not as None
    from server.store.sqlite import _loads, _pack

    plain = {"a": [1, 2.5, None, "Ω"], "b": {"c": 0.1 + 0.2}}
    assert _loads(_pack(plain)) == plain
    back = _loads(_pack({"sd": math.nan, "w": [1.0, math.inf]}))
    assert back is not None and math.isnan(back["sd"]) and back["w"] == [1.0, math.inf]
