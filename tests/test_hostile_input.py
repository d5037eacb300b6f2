"""Hostile and degenerate field books: every outcome is a result or a clear, line-numbered error.

The property tests feed the parser and the whole adjustment random text,
random bytes, keyword soup and mutated copies of valid field books (the demo
projects and small books of every statement kind).  The only acceptable
outcomes are an ``AdjustmentResult`` whose JSON and text report hold no NaN or
infinity, a ``FieldbookError`` whose issues carry a line of the file and a
sentence, or a ``NetworkError`` with a sentence.  Anything else (a
``ZeroDivisionError``, a numpy overflow warning, which pytest turns into an
error) is a bug the surveyor would meet as a server error.

The named tests below pin down the degenerate networks a surveyor really
uploads, each with the message it must get.  Hypothesis runs under the profile of
tests/hypothesis_profiles.py: the same examples on every run by default, fresh random
ones with ``HYPOTHESIS_PROFILE=random``.
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from server.errors import FieldbookError, NetworkError
from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_fieldbook
from server.report import text as text_report
from server.results.result import AdjustmentResult
from tests.hypothesis_profiles import examples

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"
DEMO_TEXTS = {p.name: p.read_text(encoding="utf-8") for p in sorted(DEMOS.glob("*.fieldbook"))}

# Small valid books covering every statement kind, unit and option.
LEVELING = """fieldbook 1
title "Two benchmarks and a new mark"
units length=m angle=dms
tests alpha=0.05 snooping=0.001 power=0.80 confidence=0.95
tolerance misclosure=4mm/sqrtkm
defaults level=1.0mm/sqrtkm

point BM-1 height=100.0000 fix
point BM-2 height=101.5000 fix
point BM-3 height=99.0000 sd=3mm note="weighted benchmark"

level BM-1 TP-1 +0.7421 len=0.35km
level TP-1 NEW  +0.5112 len=0.28km
level NEW  BM-2 +0.2450 len=0.40km
level NEW  BM-1 -1.2530 len=0.62km   note="return run"
level BM-3 NEW +2.2536 len=0.5km sd=0.3mm+1mm/sqrtkm
level NEW BM-3 -2.2530 setups=4 sd=0.4mm/setup ignore
"""
TRAVERSE = """fieldbook 1
title "Loop traverse \\"north yard\\""
units length=ft angle=dms
tolerance relative=2cm+50ppm
defaults direction=1.5sec angle=2sec distance=2mm+2ppm azimuth=3sec centering=1mm
scale factor=0.99996

point A east=1000.000 north=1000.000 fix
point B east=1300.000 north=1000.000 fix
point W east=1000.000 north=1600.000 sd_en=5mm

directions A
  B 0:00:00
  C 45:00:01 sd=2sec
  D 90:00:01
  W 270:00:00 ignore
end
directions B
  A 0:00:00
  C 270:00:02
end
angle A D C 90:00:02
azimuth A B 90:00:01
distance A C 424.2811
distance B C 300.0123
distance A D 300.0118
distance C D 300.0121
distance A W 600.0240 note="tape"
"""
GON = """units length=m angle=gon
defaults angle=0.5mgon distance=3mm
point P1 east=0 north=0 fix
point P2 east=100 north=0 fix
angle P2 P1 P3 300.0000
angle P1 P2 P3 50.0003gon
distance P1 P3 100.004
distance P2 P3 141.420
"""
SPATIAL = """units angle=deg
crs EPSG:32633
defaults slope=2mm zenith=1sec level=1mm
point A east=0 north=0 height=10 fix
slope A B 100.000 hi=1.5m ht=1.6m
zenith A B 89.5
level A B 0.87
"""
NAMES = """fieldbook 1
title "</title><script>alert(1)</script> 'q' \\"qq\\""
defaults level=1mm
point <script>alert(1)</script> height=10.0000 fix note="<b>bold</b> & co"
point +1 height=5.0000 fix
level <script>alert(1)</script> @A1 +1.0000
level +1 @A1 +6.0010
level -SUM(A1) @A1 +1.0000
level +1 -SUM(A1) +5.0000
"""
SNIPPETS = {
    "leveling": LEVELING,
    "traverse": TRAVERSE,
    "gon": GON,
    "spatial": SPATIAL,
    "names": NAMES,
}
# The control network demo is the slowest to adjust; the mutations draw it less often.
SEEDS = [
    *SNIPPETS.values(),
    *[t for n, t in DEMO_TEXTS.items() if n != "control_network.fieldbook"],
]

KEYWORDS = [
    "fieldbook",
    "title",
    "units",
    "tests",
    "tolerance",
    "defaults",
    "scale",
    "point",
    "level",
    "distance",
    "angle",
    "azimuth",
    "directions",
    "end",
    "slope",
    "zenith",
]
OPTIONS = [
    "east=",
    "north=",
    "height=",
    "fix",
    "fix=en",
    "fix=h",
    "sd=",
    "sd_en=",
    "sd_h=",
    "note=",
    "ignore",
    "len=",
    "setups=",
    "hi=",
    "ht=",
    "factor=",
    "alpha=",
    "length=",
    "angle=",
    "level=",
    "distance=",
    "direction=",
    "centering=",
    "misclosure=",
]
EXTREME_NUMBERS = [
    "0",
    "-0",
    "+0.0",
    "1e308",
    "-1e308",
    "1e-308",
    "5e-324",
    "1e400",
    "1e9",
    "1e-9",
    "123456789012345678901234567890",
    "0.0000000001",
    "nan",
    "-inf",
    "Infinity",
    "1_000",
    "٣",
    "1e",
    ".",
    "-",
    "0x10",
    "1,5",
]
UNITS = [
    "",
    "m",
    "mm",
    "cm",
    "km",
    "ft",
    "usft",
    "sec",
    "mgon",
    "deg",
    "gon",
    "ppm",
    "mm/sqrtkm",
    "mm/setup",
    "mm+2ppm",
    "mm+1mm/sqrtkm",
]
ANGLES = [
    "0:00:00",
    "359:59:59.999",
    "360:00:00",
    "-0:00:30",
    "0:60:00",
    "0:00:60",
    "12:34",
    "1:2:3:4",
    "400gon",
    "-1e308deg",
    "1e308gon",
]
WEIRD = [
    "\x00",
    "\ufeff",
    "\u202e",
    "\u200b",
    "\u00a0",
    "\u2028",
    "\r",
    "\t",
    "é",
    "名前",
    "😀",
    '"',
    '\\"',
    "#",
    "=",
    "==",
    "\\",
    "\udcff",
]

NAN_WORD = re.compile(r"(?<![\w-])[-+]?(nan|inf|infinity)(?![\w-])", re.IGNORECASE)


# ---------------------------------------------------------------------------------------
# the property every input must satisfy


def _line_count(data: str | bytes) -> int:
    raw = data.encode("utf-8", "surrogatepass") if isinstance(data, str) else data
    return len(raw.replace(b"\r\n", b"\n").replace(b"\r", b"\n").split(b"\n"))


def _check_fieldbook_error(exc: FieldbookError, data: str | bytes) -> None:
    assert exc.issues, "a FieldbookError must list at least one issue"
    last = _line_count(data)
    for issue in exc.issues:
        assert isinstance(issue.line, int) and 1 <= issue.line <= last, (issue, last)
        assert isinstance(issue.message, str) and issue.message.strip(), issue
    text = str(exc)
    assert "Traceback" not in text and text.strip()


def _user_strings(result: AdjustmentResult) -> str:
    """Every string the surveyor typed that the report repeats (names, title, notes)."""
    found: list[str] = [result.title, result.source]

    def walk(value: object) -> None:
        if isinstance(value, dict):
            for key, item in value.items():
                if key in ("name", "from_point", "at", "to", "note", "points") or key == "title":
                    found.append(json.dumps(item))
                walk(item)
        elif isinstance(value, (list, tuple)):
            for item in value:
                walk(item)

    walk(result.detail_dict())
    return " ".join(found)


def check_result(result: AdjustmentResult) -> None:
    """The contract JSON and the text report carry finite numbers only."""
    document = result.to_json_dict()
    json.dumps(document, allow_nan=False)  # raises on NaN or infinity anywhere
    assert isinstance(result.summary.redundancy, int) and result.summary.redundancy >= 0
    if NAN_WORD.search(_user_strings(result)):
        return  # a point named 'nan' would be found below; the JSON check above still holds
    text = text_report.report_text(result)
    assert not NAN_WORD.search(text), NAN_WORD.search(text)


def outcome(data: str | bytes) -> str:
    """Run parser and adjustment; return which acceptable outcome it was, or fail."""
    try:
        parse_fieldbook(data, source="hostile.fieldbook")
    except FieldbookError as exc:
        _check_fieldbook_error(exc, data)
        return "fieldbook error"
    try:
        result = adjust_fieldbook(data, source="hostile.fieldbook")
    except FieldbookError as exc:  # pragma: no cover - the parser accepted it a moment ago
        pytest.fail(f"adjust_fieldbook refused a book parse_fieldbook accepted: {exc}")
    except NetworkError as exc:
        assert str(exc).strip() and "Traceback" not in str(exc)
        assert all(isinstance(p, str) for p in exc.points)
        return "network error"
    check_result(result)
    return "result"


# ---------------------------------------------------------------------------------------
# strategies


def _numbers() -> st.SearchStrategy[str]:
    floats = st.floats(allow_nan=True, allow_infinity=True).map(repr)
    return st.one_of(st.sampled_from(EXTREME_NUMBERS), floats, st.integers().map(str))


def _tokens() -> st.SearchStrategy[str]:
    quantity = st.tuples(_numbers(), st.sampled_from(UNITS)).map("".join)
    option = st.tuples(st.sampled_from(OPTIONS), st.one_of(quantity, _numbers())).map(
        lambda kv: kv[0] + kv[1] if kv[0].endswith("=") else kv[0]
    )
    name = st.text(st.characters(blacklist_categories=("Cs",)), min_size=1, max_size=6)
    return st.one_of(
        st.sampled_from(KEYWORDS),
        option,
        quantity,
        st.sampled_from(ANGLES),
        st.sampled_from(WEIRD),
        name,
        st.sampled_from(["A", "B", "C", "BM-1", "NEW", "end"]),
    )


@st.composite
def mutated_books(draw: st.DrawFn) -> str | bytes:
    """A valid book with a few lines or tokens deleted, repeated, swapped or damaged."""
    lines = draw(st.sampled_from(SEEDS)).split("\n")
    for _ in range(draw(st.integers(1, 5))):
        if not lines:
            break
        i = draw(st.integers(0, len(lines) - 1))
        op = draw(
            st.sampled_from(
                [
                    "delete",
                    "duplicate",
                    "swap",
                    "token",
                    "drop token",
                    "repeat token",
                    "char",
                    "insert",
                    "truncate",
                ]
            )
        )
        tokens = lines[i].split(" ")
        k = draw(st.integers(0, len(tokens) - 1))
        if op == "delete":
            del lines[i]
        elif op == "duplicate":
            lines.insert(draw(st.integers(0, len(lines))), lines[i])
        elif op == "swap":
            j = draw(st.integers(0, len(lines) - 1))
            lines[i], lines[j] = lines[j], lines[i]
        elif op == "token":
            tokens[k] = draw(_tokens())
        elif op == "drop token":
            del tokens[k]
        elif op == "repeat token":
            tokens.insert(k, tokens[k])
        elif op == "char" and tokens[k]:
            c = draw(st.integers(0, len(tokens[k]) - 1))
            tokens[k] = tokens[k][:c] + draw(st.characters()) + tokens[k][c + 1 :]
        elif op == "insert":
            tokens.insert(k, draw(st.sampled_from(WEIRD)))
        elif op == "truncate":
            tokens = tokens[:k]
        if op in ("token", "drop token", "repeat token", "char", "insert", "truncate"):
            lines[i] = " ".join(tokens)
    text = "\n".join(lines)
    if draw(st.booleans()) and draw(st.integers(0, 4)) == 0:
        raw = bytearray(text.encode("utf-8", "surrogatepass"))
        for _ in range(draw(st.integers(1, 3))):
            raw.insert(draw(st.integers(0, len(raw))), draw(st.integers(0, 255)))
        return bytes(raw)
    return text


@st.composite
def keyword_soup(draw: st.DrawFn) -> str:
    """Lines of plausible words in implausible orders: reaches every statement handler."""
    lines = []
    for _ in range(draw(st.integers(1, 12))):
        words = [draw(st.sampled_from(KEYWORDS))] + draw(st.lists(_tokens(), max_size=6))
        lines.append(" ".join(words))
    return draw(st.sampled_from(["\n", "\r\n", "\r"])).join(lines)


@st.composite
def numeric_extremes(draw: st.DrawFn) -> str:
    """A valid book with one number replaced by a huge, tiny, zero or negative one."""
    text = draw(st.sampled_from([LEVELING, TRAVERSE, GON, DEMO_TEXTS["closed_traverse.fieldbook"]]))
    spots = [m for m in re.finditer(r"(?<=[ =])[+-]?\d+(\.\d+)?(?=[a-z/]*(\s|$))", text)]
    spot = draw(st.sampled_from(spots))
    value = draw(
        st.sampled_from(
            ["0", "-1", "1e30", "1e-30", "1e12", "1e-12", "1e8", "1e-6", "99999999", "0.0001"]
        )
    )
    return text[: spot.start()] + value + text[spot.end() :]


FAST = settings(
    max_examples=examples(500),
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
SLOW = settings(FAST, max_examples=examples(300))


@FAST
@given(st.text(max_size=300))
def test_random_text_never_crashes(text):
    assert outcome(text) in ("fieldbook error", "network error", "result")


@FAST
@given(st.binary(max_size=300))
def test_random_bytes_never_crash(data):
    assert outcome(data) in ("fieldbook error", "network error", "result")


@FAST
@given(keyword_soup())
def test_keyword_soup_never_crashes(text):
    assert outcome(text) in ("fieldbook error", "network error", "result")


@SLOW
@given(mutated_books())
def test_mutated_field_books_never_crash(data):
    assert outcome(data) in ("fieldbook error", "network error", "result")


@SLOW
@given(numeric_extremes())
def test_extreme_numbers_never_crash(text):
    assert outcome(text) in ("fieldbook error", "network error", "result")


@pytest.mark.parametrize("name", sorted(DEMO_TEXTS))
def test_seeds_themselves_adjust(name):
    """The seeds are valid books (else the mutations would only test the error path)."""
    assert outcome(DEMO_TEXTS[name]) == "result"


@pytest.mark.parametrize("name", ["leveling", "traverse", "gon", "names"])
def test_snippets_adjust(name):
    assert outcome(SNIPPETS[name]) == "result"


def test_spatial_snippet_names_the_point_no_observation_places():
    """Slope and zenith without a direction fix B's distance and height, not its bearing:
    the geodetic model says so and names B (never a traceback)."""
    with pytest.raises(NetworkError, match="no start position can be computed for B") as caught:
        adjust_fieldbook(SPATIAL)
    assert caught.value.points == ("B",)


# ---------------------------------------------------------------------------------------
# numbers no survey has: refused by the parser with the line, never overflowing


@pytest.mark.parametrize(
    "line, words",
    [
        ("point Z east=1e30 north=0 fix", "not a survey value"),
        ("distance A B 1e308", "not a survey value"),
        ("distance A B 5e-324", "shorter than 1 mm"),
        ("level A B 1 len=1e300km", "not a survey value"),
        ("level A B 1 len=1e-9km", "at least 1 mm"),
        ("level A B 1 sd=1e-308mm", "this small is not plausible"),
        ("distance A B 100 sd=1e308m+2ppm", "this large is not plausible"),
        ("angle A B C 10:00:00 sd=1e-9sec", "this small is not plausible"),
        ("distance A B 100 sd=2mm+1e-300ppm", "this small is not plausible"),
    ],
)
def test_implausible_numbers_are_refused_with_their_line(line, words):
    text = "defaults level=1mm distance=2mm angle=1sec\npoint A east=0 north=0 height=0 fix\n"
    with pytest.raises(FieldbookError) as info:
        adjust_fieldbook(text + line + "\n")
    (issue,) = info.value.issues
    assert issue.line == 3
    assert words in issue.message


def test_significance_too_small_to_test_is_refused():
    with pytest.raises(FieldbookError, match="significance level below") as info:
        parse_fieldbook("tests alpha=1e-30 snooping=0.001\n")
    assert info.value.issues[0].line == 1


# ---------------------------------------------------------------------------------------
# degenerate networks, each with the message it must get


def _adjusted(text: str) -> AdjustmentResult:
    result = adjust_fieldbook(text)
    check_result(result)
    return result


def _points(result: AdjustmentResult) -> dict[str, object]:
    return {p.name: p for p in result.points}


def test_coincident_points_joined_by_a_distance_are_named():
    """Two names given the same coordinates and observed apart: a copied line, not a network."""
    text = """defaults distance=2mm
point A east=5100.000 north=2200.000 fix
point B east=5100.000 north=2200.000
point C east=5200.000 north=2200.000 fix
distance A B 10.000
distance C B 100.000
"""
    with pytest.raises(NetworkError) as info:
        adjust_fieldbook(text)
    assert set(info.value.points) == {"A", "B"}
    assert "same position" in str(info.value) and "line 5" in str(info.value)


def test_coincident_fixed_points_joined_by_an_angle_are_named():
    """An angle at B whose FORE has B's own coordinates has no direction to measure."""
    text = """defaults angle=1sec distance=2mm
point A east=0 north=0 fix
point B east=100 north=0 fix
point B2 east=100.0000 north=0.0000 fix
angle A B B2 90:00:00
distance A C 50.000
distance B C 70.711
"""
    with pytest.raises(NetworkError) as info:
        adjust_fieldbook(text)
    assert set(info.value.points) == {"B", "B2"}
    assert "angle on line 5" in str(info.value)


def test_coincident_points_without_an_observation_between_them_are_fine():
    """Two names for one mark (a bench mark and its reset) are legal when nothing joins them."""
    text = """defaults distance=2mm azimuth=1sec
point A east=0 north=0 fix
point A-RESET east=0 north=0
point B east=100 north=0 fix
distance A C 50.001
distance B C 50.000
azimuth A C 90:00:00
"""
    result = _adjusted(text)
    assert "C" in _points(result)


def test_zero_distance_between_different_names_is_refused_with_its_line():
    text = "defaults distance=2mm\npoint A east=0 north=0 fix\ndistance A B 0.000\n"
    with pytest.raises(FieldbookError) as info:
        parse_fieldbook(text)
    (issue,) = info.value.issues
    assert issue.line == 3 and "greater than zero" in issue.message


def test_point_observed_only_by_one_angle_is_named():
    text = """defaults angle=2sec distance=2mm
point A east=0 north=0 fix
point B east=100 north=0 fix
angle A B C 90:00:00
"""
    with pytest.raises(NetworkError) as info:
        adjust_fieldbook(text)
    assert info.value.points == ("C",)
    assert "C" in str(info.value)


def _shift(text: str, de: float, dn: float) -> str:
    """Move every given easting and northing (observations are translation invariant)."""
    text = re.sub(r"east=([-\d.]+)", lambda m: f"east={float(m.group(1)) + de:.4f}", text)
    return re.sub(r"north=([-\d.]+)", lambda m: f"north={float(m.group(1)) + dn:.4f}", text)


def test_state_plane_coordinates_adjust_like_the_same_network_near_the_origin():
    """1e6–1e7 m coordinates lose no precision: residuals and shifts match a local copy."""
    demo = DEMO_TEXTS["control_network.fieldbook"]
    local = _adjusted(_shift(demo, -511000.0, -182000.0))
    big = _adjusted(_shift(demo, 4_489_000.0, 9_818_000.0))  # ~5.0e6 E, ~1.0e7 N
    assert big.summary.iterations <= local.summary.iterations + 1
    assert big.summary.variance_factor == pytest.approx(local.summary.variance_factor, rel=1e-6)
    for a, b in zip(local.observations, big.observations, strict=True):
        assert a.line == b.line
        if a.residual is None:
            assert b.residual is None
            continue
        tolerance = 1e-6 if a.kind == "distance" else 1e-4  # 0.001 mm; 0.0001 arc-second
        assert b.residual == pytest.approx(a.residual, abs=tolerance), a.line
        assert b.w == pytest.approx(a.w, abs=1e-4), a.line
    for p, q in zip(local.points, big.points, strict=True):
        # the two copies lie exactly 5 000 000 m east and 10 000 000 m north of each other
        assert q.east - 5_000_000.0 == pytest.approx(p.east, abs=1e-6), p.name
        assert q.north - 10_000_000.0 == pytest.approx(p.north, abs=1e-6), p.name
        if p.sd_east is not None:
            assert q.sd_east == pytest.approx(p.sd_east, abs=1e-7), p.name


LEVEL_PAIR = """defaults level={sd}
point A height=10.0000 fix
level A B 1.0000
level B A -1.0010
level A B 1.0004
"""


def test_tiny_standard_deviations_adjust_and_fail_the_global_test():
    """1e-6 mm is absurdly optimistic; the surveyor is told, and no number overflows."""
    result = _adjusted(LEVEL_PAIR.format(sd="0.000001mm"))
    assert result.summary.global_test is not None and not result.summary.global_test.passed
    assert any("too large" in w for w in result.warnings)
    assert _points(result)["B"].height == pytest.approx(
        10.0 + (1.0 + 1.0010 + 1.0004) / 3, abs=1e-9
    )


def test_huge_standard_deviations_adjust_and_fail_the_global_test_the_other_way():
    result = _adjusted(LEVEL_PAIR.format(sd="1km"))
    assert result.summary.global_test is not None and not result.summary.global_test.passed
    assert any("too small" in w for w in result.warnings)
    assert _points(result)["B"].height == pytest.approx(
        10.0 + (1.0 + 1.0010 + 1.0004) / 3, abs=1e-9
    )


SQUARE = """defaults direction={direction} distance={distance} centering=0mm
point A east=1000.000 north=1000.000 fix
point B east=1300.000 north=1000.000 fix
directions A
  B 0:00:00
  C 45:00:03
  D 90:00:01
end
directions B
  A 0:00:00
  C 270:00:02
end
distance A C 424.2655
distance B C 300.0021
distance A D 300.0020
distance C D 300.0008
"""


@pytest.mark.parametrize(
    "direction, distance", [("0.000001sec", "0.000002mm"), ("500000sec", "1km")]
)
def test_tiny_or_huge_sigmas_in_a_horizontal_network_adjust(direction, distance):
    """Scaling every sigma by the same factor changes the test, not the coordinates."""
    plain = _adjusted(SQUARE.format(direction="1sec", distance="2mm"))
    scaled = _adjusted(SQUARE.format(direction=direction, distance=distance))
    for p, q in zip(plain.points, scaled.points, strict=True):
        assert q.east == pytest.approx(p.east, abs=1e-4) and q.north == pytest.approx(
            p.north, abs=1e-4
        ), p.name
    assert scaled.summary.global_test is not None and not scaled.summary.global_test.passed


def test_mixed_tiny_and_huge_sigmas_adjust_or_name_the_points():
    """1-second directions with 1 km distances: D rests on the distances alone."""
    try:
        result = adjust_fieldbook(SQUARE.format(direction="1sec", distance="1km"))
    except NetworkError as exc:
        assert exc.points, f"the message names no point: {exc}"
        assert not str(exc).rstrip().endswith(":"), str(exc)
    else:
        check_result(result)


def test_one_observation_adjusts_with_no_redundancy_and_says_so():
    result = _adjusted("defaults level=1mm\npoint A height=10 fix\nlevel A B 1.2345\n")
    summary = result.summary
    assert summary.redundancy == 0
    assert summary.variance_factor is None and summary.global_test is None
    assert _points(result)["B"].height == pytest.approx(11.2345, abs=1e-12)
    assert any("uncontrolled" in w and "line 3" in w for w in result.warnings)
    (obs,) = result.observations
    assert obs.w is None and obs.mdb is None and not obs.flagged


def test_no_observations_is_a_network_error_that_says_so():
    with pytest.raises(NetworkError, match="no observations"):
        adjust_fieldbook("point A height=10 fix\npoint B height=11\n")


def test_only_ignored_observations_is_a_network_error_that_says_so():
    with pytest.raises(NetworkError, match="ignore"):
        adjust_fieldbook("defaults level=1mm\npoint A height=10 fix\nlevel A B 1 ignore\n")


def test_headline_gives_the_true_count_of_100_000_errors():
    """Only the first 50 errors are listed, but the headline counts all of them."""
    text = "defaults level=1mm\n" + "level A\n" * 100_000
    with pytest.raises(FieldbookError) as caught:
        parse_fieldbook(text)
    error = caught.value
    assert error.count == 100_000
    assert error.headline == "the field book has 100,000 errors"
    assert len(error.issues) == 51  # 50 listed and the line saying how many more there are
    assert error.issues[-1].message.startswith("99950 more errors from this line on")
    with pytest.raises(FieldbookError) as raised:
        parse_fieldbook("level A\n")
    few = raised.value
    assert (few.count, few.headline) == (1, "the field book has 1 error")


def test_empty_file_is_a_field_book_error_on_line_one():
    with pytest.raises(FieldbookError) as info:
        adjust_fieldbook(b"")
    assert info.value.issues[0].line == 1


def test_disconnected_leveling_without_control_names_the_loose_part():
    text = """defaults level=1mm
point A height=10 fix
level A B 1.000
level B A -1.001
level C D 2.000
level D C -2.001
"""
    with pytest.raises(NetworkError) as info:
        adjust_fieldbook(text)
    assert set(info.value.points) == {"C", "D"}
    assert "no fixed or weighted benchmark" in str(info.value)


def test_disconnected_leveling_with_control_in_each_part_adjusts_with_a_warning():
    text = """defaults level=1mm
point A height=10 fix
point C height=50 fix
level A B 1.000
level B A -1.002
level C D 2.000
level D C -2.002
"""
    result = _adjusted(text)
    assert result.summary.redundancy == 2
    assert any("2 separate parts" in w for w in result.warnings)
    assert _points(result)["B"].height == pytest.approx(11.001, abs=1e-9)
    assert _points(result)["D"].height == pytest.approx(52.001, abs=1e-9)


def test_disconnected_horizontal_part_without_control_is_named():
    text = """defaults distance=2mm azimuth=1sec
point A east=0 north=0 fix
distance A B 100.000
azimuth A B 90:00:00
distance C D 100.000
azimuth C D 0:00:00
"""
    with pytest.raises(NetworkError) as info:
        adjust_fieldbook(text)
    assert set(info.value.points) == {"C", "D"}
    assert "translation" in str(info.value)


def test_disconnected_horizontal_parts_each_with_control_adjust_with_a_warning():
    text = """defaults distance=2mm azimuth=1sec
point A east=0 north=0 fix
point C east=5000 north=0 fix
distance A B 100.000
azimuth A B 90:00:00
distance A B 100.003
distance C D 100.000
azimuth C D 0:00:00
distance C D 100.001
"""
    result = _adjusted(text)
    assert any("2 separate parts" in w for w in result.warnings)
    assert _points(result)["B"].east == pytest.approx(100.0015, abs=1e-6)
    assert _points(result)["D"].north == pytest.approx(100.0005, abs=1e-6)


def test_all_points_fixed_is_a_check_of_the_observations():
    """Contract: redundancy = used observations minus the orientation unknowns of the rounds."""
    text = """defaults direction=1sec distance=2mm level=1mm
point A east=0 north=0 fix
point B east=100 north=0 fix
point C east=100 north=100 fix
directions A
  B 0:00:00
  C 315:00:02
end
distance A B 100.002
distance B C 99.999
"""
    result = _adjusted(text)
    summary = result.summary
    assert summary.unknowns == 1  # the round's orientation only
    assert summary.redundancy == 4 - 1
    by_line = {o.line: o for o in result.observations}
    assert by_line[9].residual == pytest.approx(-0.002, abs=1e-9)  # computed 100 − observed
    assert by_line[10].residual == pytest.approx(0.001, abs=1e-9)
    assert all(p.sd_east == 0.0 for p in result.points)


def test_all_benchmarks_fixed_checks_the_leveling():
    text = "defaults level=1mm\npoint A height=10 fix\npoint B height=11 fix\nlevel A B 1.002\n"
    result = _adjusted(text)
    assert result.summary.unknowns == 0 and result.summary.redundancy == 1
    assert result.observations[0].residual == pytest.approx(-0.002, abs=1e-12)


def test_round_of_one_direction_is_accepted_with_a_warning():
    text = """defaults direction=1sec distance=2mm azimuth=1sec
point A east=0 north=0 fix
point B east=100 north=0 fix
directions A
  B 0:00:00
end
distance A B 100.001
"""
    result = _adjusted(text)
    assert any("only one direction" in w and "line 4" in w for w in result.warnings)
    direction = next(o for o in result.observations if o.kind == "direction")
    assert direction.residual == pytest.approx(0.0, abs=1e-9)  # its orientation absorbs it
    assert direction.w is None  # uncontrolled
    assert math.isfinite(result.observations[-1].residual)
