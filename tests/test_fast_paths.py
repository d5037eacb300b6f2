"""The fast paths give exactly what the careful paths give.

* The parser reads common well-formed observation lines (``level``,
  ``distance``, ``slope``/``zenith`` with ``hi=``/``ht=``, a direction of a
  round) without tokens (``fieldbook._Parser.fast_line``) and hands
  everything else to the careful path: both must give equal ``Fieldbook``
  objects, equal observation tables column by column, or equal issues.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from server.errors import FieldbookError
from server.fieldbook import parser as fieldbook_module
from server.fieldbook.parser import parse_fieldbook
from server.fieldbook.table import _ARRAYS as TABLE_ARRAYS
from server.fieldbook.table import ObservationTable
from tests.hypothesis_profiles import examples

ROOT = Path(__file__).resolve().parents[1]
DEMO_TEXTS = {
    p.name: p.read_text(encoding="utf-8")
    for p in sorted((ROOT / "demo_projects").glob("*.fieldbook"))
}
sys.path.insert(0, str(ROOT / "bench"))
import networks  # noqa: E402 - bench/networks.py: the benchmark field books


def _outcome(text: str, fast: bool, monkeypatch: pytest.MonkeyPatch):
    monkeypatch.setattr(fieldbook_module, "_FAST_LINES", fast)
    try:
        return parse_fieldbook(text, source="book.fieldbook")
    except FieldbookError as exc:
        return ("error", exc.issues, str(exc))


def assert_same(text: str, monkeypatch: pytest.MonkeyPatch) -> None:
    careful = _outcome(text, False, monkeypatch)
    fast = _outcome(text, True, monkeypatch)
    assert fast == careful
    if not isinstance(fast, tuple):
        assert_same_table(fast.table, careful.table)
        # the lazy objects are those of the table, row by row
        assert list(fast.observations) == [
            fast.table.observation(k) for k in range(len(fast.table))
        ]


def assert_same_table(fast: ObservationTable, careful: ObservationTable) -> None:
    """Every column equal, NaN where NaN (an absent value), same dtype."""
    for name in ("names", "sigmas", "kinds", "notes", "baselines"):
        assert getattr(fast, name) == getattr(careful, name), name
    for name in TABLE_ARRAYS:
        a, b = getattr(fast, name), getattr(careful, name)
        assert a.dtype == b.dtype, name
        np.testing.assert_array_equal(a, b, err_msg=name, strict=True)


def _tokenized_lines(text: str, monkeypatch: pytest.MonkeyPatch) -> int:
    """How many lines the careful path had to tokenize."""
    calls = []
    original = fieldbook_module.tokenize

    def counting(line: str):
        if line.strip():
            calls.append(line)
        return original(line)

    monkeypatch.setattr(fieldbook_module, "tokenize", counting)
    monkeypatch.setattr(fieldbook_module, "_FAST_LINES", True)
    parse_fieldbook(text)
    return len(calls)


LEVELING = """fieldbook 1
units length=m
defaults level=1.0mm/sqrtkm
point A height=100 fix
level A B +1.2345 len=0.5km
level B C -0.5 len=420m   # a comment
\tlevel C A -0.7340 len=0.3km
"""
HORIZONTAL = """fieldbook 1
units length=m angle=dms
defaults direction=1sec distance=2mm+2ppm centering=1mm
scale factor=0.9996
point A east=1000 north=1000 fix
point B east=1100 north=1000 fix
directions A
  B 90:00:00
  C 45:00:00.5
end
directions C sd=2sec ignore note="weak"
  A 225:00:00
  B 315:00:00#mark
end
distance A C 141.42
distance B C 100.0
"""


@pytest.mark.parametrize("text", [LEVELING, HORIZONTAL], ids=["leveling", "horizontal"])
def test_the_fast_path_reads_the_plain_lines(text, monkeypatch):
    assert_same(text, monkeypatch)
    observations = len(parse_fieldbook(text).observations)
    lines = sum(1 for line in text.splitlines() if line.strip())
    # only the statements that are not plain observations went through the tokenizer
    assert _tokenized_lines(text, monkeypatch) == lines - observations


@pytest.mark.parametrize("name", sorted(DEMO_TEXTS))
def test_demo_projects_parse_alike(name, monkeypatch):
    assert_same(DEMO_TEXTS[name], monkeypatch)


def test_benchmark_networks_parse_alike(monkeypatch):
    assert_same(networks.leveling(1_000), monkeypatch)
    assert_same(networks.horizontal(200, sparse=True, fixed_every=50), monkeypatch)
    assert_same(networks.geodetic(60), monkeypatch)


def test_the_fast_path_reads_slope_and_zenith_lines_after_the_first(monkeypatch):
    text = networks.geodetic(60)
    spatial = sum(1 for line in text.splitlines() if line.split()[:1] in (["slope"], ["zenith"]))
    careful = _tokenized_lines(text, monkeypatch)
    monkeypatch.setattr(fieldbook_module, "_FAST_SPATIAL", fieldbook_module.re.compile("(?!)"))
    # every slope and zenith line but the first is read without tokens
    assert _tokenized_lines(text, monkeypatch) - careful == spatial - 1


_BASE = """fieldbook 1
defaults level=1mm/sqrtkm distance=2mm+2ppm direction=1sec
point A height=10 east=0 north=0 fix
"""


@pytest.mark.parametrize(
    "line",
    [
        "distance A B 0.0001",
        "distance A B 0",
        "distance A B -5",
        "distance A B 1e9",
        "distance A B 12m",
        "distance A A 10",
        "distance A end 10",
        "distance A B 10 len=1km",
        "level A B 1 len=0.0005m",
        "level A B 1 len=0km",
        "level A B 1",
        "level A B 1 len=5",
        "level A B 1e9 len=1km",
        "level A B nan len=1km",
        "level A B 1 len=1km#x",
        "level A B\t1\tlen=1km",
        "LEVEL A B 1 len=1km",
        "level A B 1 len=1KM",
        "level A " + "B" * 65 + " 1 len=1km",
        "level A B\u200b 1 len=1km",
    ],
)
def test_edge_lines_parse_alike(line, monkeypatch):
    assert_same(_BASE + line + "\n", monkeypatch)


@pytest.mark.parametrize(
    "entry",
    [
        "B 12:00:00",
        "A 12:00:00",
        "end 1:00:00",
        "Point 1:00:00",
        "B 12:60:00",
        "B 361:00:00",
        "B -1:00:00",
        "B 12",
        "B 12:00:00 x",
        "B 12:00:00#c",
        "B\t1:2:3",
    ],
)
@pytest.mark.parametrize("header", ["", "units angle=gon\n", "units angle=oops\n"])
def test_edge_directions_parse_alike(entry, header, monkeypatch):
    text = _BASE.replace("fieldbook 1\n", "fieldbook 1\n" + header)
    assert_same(text + "directions A\n  " + entry + "\n  C 1:00:00\nend\n", monkeypatch)


# Lines near the fast path's edges: every one must give what the careful path gives.
_NAMES = st.sampled_from(
    [
        "A",
        "B",
        "P1",
        "end",
        "END",
        "level",
        "a=b",
        "x#y",
        '"q"',
        "Ünï",
        "B\u200b",
        "N" * 65,
        "N" * 64,
        "-1",
        "C.2",
        "dir/1",
    ]
)
_NUMBERS = st.sampled_from(
    [
        "1.5",
        "+0.7421",
        "-2",
        "0",
        "0.0001",
        "1e3",
        "1e9",
        "nan",
        "inf",
        "1,5",
        "12m",
        ".5",
        "5.",
        "1e400",
        "90:00:00",
        "359:59:59.9",
        "360:00:00",
        "12:60:00",
        "12:00:60",
        "-1:00:00",
        "100gon",
        "45deg",
        "400.0",
        "",
        "x",
    ]
)
_LENGTHS = st.sampled_from(
    [
        "",
        " len=0.5km",
        " len=420m",
        " len=0km",
        " len=0.0005m",
        " len=1e9km",
        " len=5",
        " len=3ft",
        " LEN=1km",
        " len=",
        " setups=3",
        " sd=2mm",
        " ignore",
        ' note="x"',
        " len=1km len=2km",
        " len=1km#c",
        "  # comment",
        "\t",
        " hi=1m",
        " hi=1.5m ht=1.8m",
        " ht=2ft hi=0.5m",
        " ht=1.8m",
        " hi=1.5",
        " hi=1.5m hi=1.6m",
        " HI=1m",
        " hi=1e400m",
        " hi=1.5xx",
        " hi=-0.2m  # low",
    ]
)
_SPACE = st.sampled_from([" ", "  ", "\t", " \t"])
_LEAD = st.sampled_from(["", " ", "  ", "\t"])


@st.composite
def _observation_line(draw) -> str:
    kind = draw(
        st.sampled_from(["level", "distance", "Level", "angle", "azimuth", "slope", "zenith"])
    )
    names = draw(st.lists(_NAMES, min_size=2, max_size=3))
    sep = draw(_SPACE)
    return draw(_LEAD) + sep.join([kind, *names, draw(_NUMBERS)]) + draw(_LENGTHS)


@st.composite
def _direction_line(draw) -> str:
    sep = draw(_SPACE)
    parts = [draw(_NAMES), draw(_NUMBERS)]
    return (
        draw(_LEAD)
        + sep.join(parts)
        + draw(st.sampled_from(["", " sd=1sec", " ignore", "#c", " x"]))
    )


_HEADERS = st.sampled_from(
    [
        "units length=m angle=dms",
        "units length=ft angle=gon",
        "units length=usft angle=deg",
        "units angle=bogus",
        "units length=m",
    ]
)
_DEFAULTS = st.sampled_from(
    [
        "defaults level=1mm/sqrtkm distance=2mm+2ppm direction=1sec",
        "defaults level=0.5mm/setup",
        "defaults level=1mm distance=3mm centering=0.5mm",
        "defaults level=1mm/sqrtkm+0.2mm/setup",
        "defaults distance=2cm direction=-1sec",
        "defaults level=2",
        "",
    ]
)


_SPATIAL_DEFAULTS = st.sampled_from(
    ["defaults slope=2mm+2ppm zenith=1.5sec", "defaults zenith=3sec", "defaults slope=1mm", ""]
)


@st.composite
def _book(draw) -> str:
    lines = ["fieldbook 1", draw(_HEADERS), draw(_DEFAULTS)]
    if draw(st.booleans()):
        lines.insert(1, "crs local lat=47 lon=8")
        lines.append(draw(_SPATIAL_DEFAULTS))
    if draw(st.booleans()):
        lines.append("scale factor=" + draw(st.sampled_from(["0.9996", "1.02", "1.5"])))
    lines.append("point A height=10 east=0 north=0 fix")
    for _ in range(draw(st.integers(1, 6))):
        if draw(st.booleans()):
            lines.append(draw(_observation_line()))
        else:
            at = draw(_NAMES)
            options = draw(st.sampled_from(["", " sd=1sec", " sd=bad", ' ignore note="n"']))
            lines.append(f"directions {at}{options}")
            lines += draw(st.lists(_direction_line(), max_size=4))
            if draw(st.integers(0, 5)):
                lines.append("end")
    if draw(st.booleans()):
        # an observation before the body starts, and a header after it
        lines.insert(1, draw(_observation_line()))
    return "\n".join(lines) + "\n"


@settings(
    max_examples=examples(400),
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(_book())
def test_fast_and_careful_paths_agree_on_edge_lines(monkeypatch, text):
    assert_same(text, monkeypatch)


_PLAIN = st.sampled_from(
    [
        "level A B +1.2345 len=0.5km",
        "level B C -0.5 len=420m",
        "distance A B 141.42",
        "level C A -0.734 len=0.3km  # comment",
        "distance B C 100.0",
        "\tlevel C D 2 len=1km",
    ]
)


# lines of the shape a run reads at once that fail one of its checks
_RUN_EDGES = st.sampled_from(
    [
        "distance A B 0.0001",
        "distance A B 0",
        "distance A B -5",
        "distance A A 10",
        "distance A B 10 len=1km",
        "distance A B 1e999",
        "level A B 1e999 len=1km",
        "level A B 1 len=0.0005m",
        "level A B 1 len=1xx",
        "level A B 1 len=1e999km",
        "level A B 1",
        "level B B 1 len=1km",
        "level A B 1 len=0.001m",
        "distance A B 0.001",
        "level A B -0 len=1ft",
    ]
)
_RUN_DEFAULTS = st.sampled_from(
    [
        "defaults level=1mm/sqrtkm distance=2mm+2ppm centering=0.5mm",
        "defaults level=1mm distance=3mm",
        "defaults level=1mm/sqrtkm+0.2mm/setup distance=2mm",
        "defaults level=1mm",
        "defaults distance=2mm",
    ]
)


@st.composite
def _run_book(draw) -> str:
    """Long runs of plain lines (read a chunk at a time) with edge lines among them."""
    lines = ["fieldbook 1", draw(_HEADERS), draw(_RUN_DEFAULTS)]
    if draw(st.booleans()):
        lines.append("scale factor=" + draw(st.sampled_from(["0.9996", "1.02"])))
    lines.append("point A height=10 east=0 north=0 fix")
    for _ in range(draw(st.integers(1, 3))):
        for _ in range(draw(st.integers(10, 60))):
            choice = draw(st.integers(0, 29))  # mostly plain lines
            edge = draw(_RUN_EDGES) if choice % 2 else draw(_observation_line())
            lines.append(draw(_PLAIN) if choice > 1 else edge)
        lines.append(draw(st.sampled_from(["", "# a comment", "defaults level=2mm/sqrtkm"])))
    return "\n".join(lines) + "\n"


@settings(
    max_examples=examples(60),
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(_run_book())
def test_fast_and_careful_paths_agree_on_long_runs(monkeypatch, text):
    assert_same(text, monkeypatch)


def test_a_long_run_is_read_without_tokens_up_to_its_edge_lines(monkeypatch):
    body = [f"level M{k} M{k + 1} 0.{k:03d} len=0.{k % 9 + 1}km" for k in range(100)]
    body[40] = "level M40 M40 1 len=1km"  # to itself: the careful path reports it
    body[70] = "level M70 M71 1 len=1xx"  # not a length unit
    text = LEVELING + "\n".join(body) + "\n"
    with pytest.raises(FieldbookError) as caught:
        parse_fieldbook(text)
    assert [issue.line for issue in caught.value.issues] == [48, 78]
    assert_same(text, monkeypatch)
    good = LEVELING + "\n".join(body[:40] + body[41:70] + body[71:]) + "\n"
    assert_same(good, monkeypatch)
    observations = len(parse_fieldbook(good).observations)
    lines = sum(1 for line in good.splitlines() if line.strip())
    assert _tokenized_lines(good, monkeypatch) == lines - observations


# Stretches of plain lines and whole rounds, read a chunk at a time (``_Parser.fast_block``),
# with edge lines among them; small chunks put chunk ends inside rounds and at their edges.
_ROUND_ENTRIES = st.sampled_from(
    [
        "  P1 12:00:00",
        "  P2 359:59:59.99",
        "\tP3 -1:00:00",
        "  P4 0:0:0.5  # c",
        "  P5 180:00:00#c",
        "  P6 007:08:09.123456789",
    ]
)
_ROUND_EDGES = st.sampled_from(
    [
        "  A 12:00:00",  # to the occupied point
        "  P1 12:60:00",
        "  P1 12:00:60",
        "  P1 12:00:00.1234567890123456789012345678901234567890",
        "  Level 1:00:00",
        "  P1 12:00:00 ignore",
        "  P1 12:00:00 sd=2sec",
        "  P1 12",
        "  P1 100gon",
        "  P1 ?",
        "  END",
        "end # closed",
        "END",
        "directions B",
        "distance A B 10",
        "",
        "# note",
        "  P1\u00a012:00:00",
        "point Q east=1 north=2",
    ]
)


@st.composite
def _round_book(draw) -> str:
    lines = ["fieldbook 1", draw(_HEADERS), draw(_DEFAULTS)]
    if draw(st.booleans()):
        lines.append("scale factor=" + draw(st.sampled_from(["0.9996", "1.02"])))
    lines.append("point A height=10 east=0 north=0 fix")
    for _ in range(draw(st.integers(1, 12))):
        choice = draw(st.integers(0, 9))
        if choice < 5:
            at = draw(st.sampled_from(["A", "B", "A", "end", "directions", "1:2:3"]))
            option = draw(st.sampled_from(["", "", "", "", " sd=2sec", " # c", " x"]))
            lines.append(f"directions {at}{option}")
            for _ in range(draw(st.integers(0, 5))):
                edge = draw(st.integers(0, 9)) == 0
                lines.append(draw(_ROUND_EDGES) if edge else draw(_ROUND_ENTRIES))
            if draw(st.integers(0, 9)):
                lines.append("end")
        elif choice < 8:
            lines.append(draw(_PLAIN) if choice < 7 else draw(_RUN_EDGES))
        else:
            lines.append(draw(_ROUND_EDGES))
    return "\n".join(lines) + "\n"


@settings(
    max_examples=examples(300),
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(_round_book(), st.sampled_from([1, 2, 3, 5, 64]))
def test_fast_and_careful_paths_agree_on_rounds_read_at_once(monkeypatch, text, chunk):
    monkeypatch.setattr(fieldbook_module, "_CHUNK_MIN", chunk)
    monkeypatch.setattr(fieldbook_module, "_RUN_MIN", 1)  # try again at almost every line
    assert_same(text, monkeypatch)


@pytest.mark.parametrize("chunk", [1, 4, 7, 64])
def test_benchmark_rounds_parse_alike_in_any_chunks(chunk, monkeypatch):
    monkeypatch.setattr(fieldbook_module, "_CHUNK_MIN", chunk)
    assert_same(networks.horizontal(120, sparse=False, fixed_every=40), monkeypatch)


def test_whole_rounds_are_read_without_tokens(monkeypatch):
    text = networks.horizontal(200, sparse=True, fixed_every=50)
    lines = text.splitlines()
    last_point = max(k for k, line in enumerate(lines) if line.startswith("point "))
    # the header, the point lines and the few after them (a stretch is tried again
    # _CHUNK_MIN lines after one that failed) go through the tokenizer, no line after that
    tokenized = _tokenized_lines(text, monkeypatch)
    assert last_point + 1 <= tokenized <= last_point + 1 + fieldbook_module._CHUNK_MIN
    assert tokenized < len(lines) / 25  # line by line, every directions and end line
