"""The observation table and its lazy views give back exactly the observations parsed.

``fieldbook/table.py`` holds the observations of a field book as columns and
makes ``Observation`` objects only when one is read; the parser's rows, the
table's columns and the objects must say the same, field by field, for every
demo and for books built in code (kinds of a test's own, absent values,
planned observations, notes and baselines).
"""

from __future__ import annotations

import math
import sys
from dataclasses import fields, replace
from pathlib import Path

import numpy as np
import pytest

from server.fieldbook.model import Fieldbook, Observation
from server.fieldbook.parser import parse_fieldbook
from server.fieldbook.table import FIELDS, ObservationRows, ObservationTable, row_of
from server.model.network import build_network
from server.units import Quantity

ROOT = Path(__file__).resolve().parents[1]
DEMOS = sorted((ROOT / "demo_projects").glob("*.fieldbook"))
sys.path.insert(0, str(ROOT / "bench"))
import networks  # noqa: E402 - bench/networks.py: the benchmark field books


def _same(a: Observation, b: Observation) -> None:
    """Field by field, NaN equal to NaN (a planned value)."""
    for f in fields(Observation):
        x, y = getattr(a, f.name), getattr(b, f.name)
        if isinstance(x, float) and math.isnan(x):
            assert isinstance(y, float) and math.isnan(y), f.name
        else:
            assert x == y and type(x) is type(y), f.name


def test_the_fields_are_those_of_observation():
    assert tuple(f.name for f in fields(Observation)) == FIELDS


@pytest.mark.parametrize("path", DEMOS, ids=[p.name for p in DEMOS])
def test_a_table_made_from_rows_gives_every_demo_observation_back(path):
    book = parse_fieldbook(path.read_bytes())
    parsed = list(book.observations)
    # a fresh table of the same rows: its objects are made from the columns alone
    table = ObservationTable.from_rows([row_of(o) for o in parsed])
    assert len(table) == len(parsed)
    for row, obs in enumerate(parsed):
        _same(table.observation(row), obs)
        assert table.names[table.frm[row]] == obs.from_point
        assert table.kinds[table.kind[row]] == obs.kind
        assert table.sigmas[table.sigma[row]] == obs.sigma


def test_absent_values_planned_observations_and_own_kinds_round_trip():
    sd = Quantity(0.001, per_sqrtkm=0.001)
    made = [
        Observation(3, "level", "A", None, "B", 1.5, sd, length_km=0.4, note="first"),
        Observation(4, "level", "B", None, "C", math.nan, sd, setups=6, booked=math.nan,
                    planned=True),
        Observation(5, "direction", "C", "C", "A", 0.25, Quantity(1e-5, angular=True),
                    round_line=2, ignored=True, booked=6.5),
        Observation(7, "vector", "A", None, "C", -0.0, Quantity(0.002), instrument_height=1.5),
    ]  # fmt: skip
    table = ObservationTable.from_rows([row_of(o) for o in made])
    assert table.kinds[table.kind[3]] == "vector"  # a kind of a test's own model
    assert table.at.tolist() == [-1, -1, table.names.index("C"), -1]
    assert table.setups.tolist() == [-1, 6, -1, -1]
    assert table.notes == {0: "first"}
    picked = table.take(np.array([2, 0]))  # rows renumbered, the note follows its row
    assert picked.notes == {1: "first"} and picked.observation(1).note == "first"
    assert picked.line.tolist() == [5, 3] and table.take(np.array([1])).notes == {}
    for row, obs in enumerate(made):
        _same(table.observation(row), obs)
    assert math.copysign(1.0, table.observation(3).value) == -1.0  # -0.0 stays -0.0
    assert table.sigma_part("per_sqrtkm").tolist() == [0.001, 0.001, 0.0, 0.0]


def test_views_share_their_objects_and_compare_as_tuples():
    book = parse_fieldbook(networks.leveling(60))
    view = book.observations
    assert isinstance(view, ObservationRows)
    first = view[0]
    assert view[0] is first and view[-1] is view[len(view) - 1]
    assert view == tuple(view) and tuple(view) == view
    with pytest.raises(IndexError):
        view[len(view)]
    network = build_network(replace(book))  # replace: the same table, a new book object
    used = network.used
    assert isinstance(used, ObservationRows)
    assert used[0] is book.observations[int(network.used_rows[0])]
    np.testing.assert_array_equal(network.used_table.line, book.table.line[network.used_rows])


def test_rows_made_together_are_the_objects_made_one_at_a_time():
    book = parse_fieldbook(networks.leveling(60))
    table = book.table
    early = table.observation(7)
    rows = [3, 7, len(table) - 1, 3, 12]
    made = table.observations_at(rows)
    assert made[1] is early and made[0] is made[3]  # kept ones kept, a repeated row once
    assert made == [parse_fieldbook(networks.leveling(60)).observations[k] for k in rows]
    assert all(table.observation(k) is obs for k, obs in zip(rows, made))
    assert table.observations_at([]) == []


def test_a_book_built_from_objects_is_tabled_once_and_keeps_its_objects():
    parsed = parse_fieldbook(networks.leveling(60))
    objects = tuple(parsed.observations)
    book = Fieldbook(points=parsed.points, observations=objects)
    assert book.table is book.table
    assert all(a is b for a, b in zip(book.table.observations(), objects, strict=True))
    network = build_network(book)
    assert all(a is b for a, b in zip(network.used, objects, strict=True))
    # a sequence built elsewhere finds its rows by line
    rebuilt = replace(network, used=tuple(objects[1:]))
    assert rebuilt.used_rows.tolist() == list(range(1, len(objects)))
