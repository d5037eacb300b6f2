"""Leveling loops as the crew ran them: the smallest closed loops first, then the runs."""

from __future__ import annotations

import pytest

from server.fieldbook.parser import parse_fieldbook
from server.model.misclosures import leveling_misclosures

# Two benchmarks close to a long triangle C–D–E: a run A–C–D–B is far shorter than the
# loop, so a basis chosen only by length would hold two runs and no loop at all.
TRIANGLE_NEAR_BENCHMARKS = """fieldbook 1
units length=m
tolerance misclosure=4mm/sqrtkm
defaults level=1mm/sqrtkm
point A height=100.000 fix
point B height=101.000 fix
level A C +0.500 len=0.1km
level B D +0.300 len=0.1km
level C D +0.8035 len=3km
level D E -2.000 len=3km
level E C +1.2010 len=3km
"""


def test_the_loop_the_crew_ran_is_reported_before_the_runs() -> None:
    entries = leveling_misclosures(parse_fieldbook(TRIANGLE_NEAR_BENCHMARKS))
    assert [m.kind for m in entries] == ["loop", "run"]
    loop = entries[0]
    assert set(loop.points) == {"C", "D", "E"} and loop.points[0] == loop.points[-1]
    # around the loop the three rises add to +0.8035 − 2.000 + 1.2010 = +4.5 mm
    assert abs(loop.misclosure) == pytest.approx(0.0045, abs=1e-9)
    assert loop.length == pytest.approx(9000.0)
    # 4 mm·√9 = 12 mm: within
    assert loop.allowed == pytest.approx(0.012)
    assert loop.exceeds is False
    run = entries[1]
    assert {run.points[0], run.points[-1]} == {"A", "B"}


def test_two_faces_of_a_square_with_a_diagonal_are_the_loops() -> None:
    # square P-Q-R-S with the diagonal P-R: the smallest loops are the two triangles,
    # not the outer square (marks of equal spacing, 1 km sections, diagonal 1.4 km)
    text = """fieldbook 1
units length=m
defaults level=1mm/sqrtkm
point P height=50.000 fix
level P Q +1.000 len=1km
level Q R +1.000 len=1km
level R S -1.000 len=1km
level S P -1.001 len=1km
level P R +2.002 len=1.4km
"""
    loops = leveling_misclosures(parse_fieldbook(text))
    assert [m.kind for m in loops] == ["loop", "loop"]
    assert sorted(len(m.points) for m in loops) == [4, 4]  # triangles, each repeating its start
    assert sorted(round(abs(m.misclosure), 6) for m in loops) == [0.001, 0.002]
