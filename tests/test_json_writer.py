"""The JSON writer (``server/results/json_writer.py``): valid JSON that reads back to the very
object written, laid out as ``json.dumps(indent=2)`` lays it out, NaN and infinity refused.

The reference is the standard library's ``json`` module: its parser reads our text back, and
its indented layout is what every line must match (numbers compared by value, since floats
below 1e-4 are spelled without an exponent here).
"""

from __future__ import annotations

import io
import json
import math
import re
import sys
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from server.results.json_writer import json_bytes, refuse_non_finite, write_json
from tests.hypothesis_profiles import examples

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "bench"))
import networks  # noqa: E402 - bench/networks.py: the benchmark field books

_FLOATS = st.floats(allow_nan=False, allow_infinity=False)
_SCALAR = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(2**63), 2**63 - 1),  # results hold counts and line numbers
    _FLOATS,
    st.text(max_size=8),
)
_KEYS = st.lists(st.text(max_size=6), min_size=1, max_size=6, unique=True)


@st.composite
def _records(draw):
    """Lists of records as results hold them: columns of one kind, or of anything, records
    nested as a point's ellipse, lists as a misclosure's marks, now and then a stray key."""
    keys = draw(_KEYS)
    makers = [
        _FLOATS,
        st.one_of(st.none(), _FLOATS),
        _SCALAR,
        st.lists(_SCALAR, max_size=3),
        st.one_of(st.none(), st.dictionaries(st.text(max_size=3), _SCALAR, max_size=3)),
    ]
    kinds = {key: draw(st.sampled_from(makers)) for key in keys}
    count = draw(st.integers(0, 5))
    records = [{key: draw(kinds[key]) for key in keys} for _ in range(count)]
    if count and draw(st.booleans()):
        records[-1] = {**records[-1], "extra": draw(_SCALAR)}
    return records


def _reread(document: object) -> object:
    text = json_bytes(document)
    assert text.decode("utf-8")  # valid UTF-8
    return json.loads(text)


@settings(max_examples=examples(300))
@given(_records(), st.integers(0, 2))
def test_records_read_back_as_the_very_values_written(records, depth):
    document: object = records
    for _ in range(depth):
        document = {"level": document, "n": 1}
    # the standard library's parser gives back every value exactly (floats to the last bit)
    assert _reread(document) == document
    assert json.loads(json_bytes(document, compact=True)) == document


_NUMBER = re.compile(r'^(\s*(?:"(?:[^"\\]|\\.)*": )?)(-?\d[\d.eE+-]*)(,?)$')


def _same_layout(ours: str, reference: str) -> None:
    """Line by line the same text, except that a number may be spelled otherwise."""
    mine, theirs = ours.split("\n"), reference.split("\n")
    assert len(mine) == len(theirs)
    for a, b in zip(mine, theirs, strict=True):
        if a == b:
            continue
        ma, mb = _NUMBER.match(a), _NUMBER.match(b)
        assert ma and mb, (a, b)
        assert (ma[1], ma[3]) == (mb[1], mb[3]), (a, b)
        assert float(ma[2]) == float(mb[2]), (a, b)


def test_a_benchmark_result_is_laid_out_as_json_dumps_indent_2():
    from server.pipeline import adjust_fieldbook

    data = adjust_fieldbook(networks.leveling(1_000)).to_json_dict()
    data["extra"] = {
        "empty": [],
        "nothing": {},
        "nested": [[1, 2.5e-07], {"k": 'é " \\ }, {'}],
        "numbers": [1e16, -0.0, 123456789.123, 7.19417607797368e-05, True, None],
    }
    text = json_bytes(data).decode("utf-8")
    _same_layout(text, json.dumps(data, indent=2, ensure_ascii=False, allow_nan=False))
    assert json.loads(text) == data
    assert "0.0000719417607797368" in text  # the same double as 7.19417607797368e-05


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
@pytest.mark.parametrize(
    "place",
    [
        lambda v: v,
        lambda v: [{"a": 1.0, "b": "x"}, {"a": v, "b": "y"}],
        lambda v: {"points": [{"ellipse": None}, {"ellipse": {"semi_major": v}}]},
        lambda v: {"misclosures": [{"points": ["A", "B"], "length": [1.0, v]}]},
        lambda v: {"summary": {"n": 3, "variance_factor": v, "ok": True}},
        lambda v: [[1, "x", None], {"deep": [[v]]}],
    ],
)
def test_nan_and_infinity_are_refused_wherever_they_are(bad, place):
    document = place(bad)
    with pytest.raises(ValueError, match="Out of range float values are not JSON compliant"):
        json_bytes(document)
    with pytest.raises(ValueError):  # the standard library refuses the same document
        json.dumps(document, allow_nan=False)


def test_finite_floats_whose_sum_overflows_are_written():
    # the check sums a column first; a sum of finite values past the largest double
    # must not be taken for an infinity
    document = {"big": [1.7e308, 1.7e308, -1e-300], "n": [{"a": 1e308}, {"a": 1e308}]}
    refuse_non_finite(document)
    assert json.loads(json_bytes(document)) == document


def test_written_to_a_binary_stream_or_a_text_stream():
    document = {"title": "Höhenzug – Süd", "values": [1.5, None]}
    binary = io.TextIOWrapper(io.BytesIO(), encoding="utf-8")
    binary.write("before\n")
    write_json(document, binary)
    binary.flush()
    text = binary.buffer.getvalue().decode("utf-8")  # type: ignore[attr-defined]
    assert text.startswith("before\n{\n") and text.endswith("}\n")
    assert json.loads(text[len("before\n") :]) == document
    plain = io.StringIO()
    write_json(document, plain)
    assert plain.getvalue() == text[len("before\n") :]
