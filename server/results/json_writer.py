"""JSON text of results: one encoder (orjson) for the command line, the monitor and the API.

``json_bytes`` writes UTF-8 with two-space indentation, the layout of
``json.dumps(obj, indent=2)``; ``compact=True`` writes no whitespace (the API).
Two spellings differ from the standard library's, both valid JSON with the same
values: floats below 1e-4 are written without an exponent (0.0000719… rather than
7.19…e-05, the same double when read back) and text is UTF-8, not ``\\u`` escapes.

NaN and infinity have no JSON spelling: the encoder would write them as null, so
they are refused here, as ``json.dumps(allow_nan=False)`` refuses them.
"""

from __future__ import annotations

import gc
import math
import sys
from collections.abc import Iterable
from itertools import chain
from operator import itemgetter
from typing import IO, Any

import orjson

_INDENTED = orjson.OPT_INDENT_2
_NONE = type(None)
#: Types written as they are; a float is checked, the others cannot be out of range.
_SCALARS = frozenset({float, str, int, bool, _NONE})


class FiniteRecords(list[dict[str, Any]]):
    """JSON records whose floats were found finite where they were made (from arrays, at
    C speed): ``refuse_non_finite`` does not look at them again."""

    __slots__ = ()


def json_bytes(obj: object, *, compact: bool = False) -> bytes:
    """``obj`` as JSON text (UTF-8, no final newline); ValueError for NaN or infinity."""
    # no cyclic garbage collection meanwhile: the check makes large short-lived lists,
    # and full collections would walk every object of a large result again and again
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        refuse_non_finite(obj)
        return orjson.dumps(obj, option=0 if compact else _INDENTED)
    finally:
        if was_enabled:
            gc.enable()


def write_json(obj: object, stream: IO[str] | None = None) -> None:
    """Write ``obj`` as indented JSON and a newline to a text stream (stdout by default)."""
    write_bytes([json_bytes(obj), b"\n"], stream)


def write_bytes(pieces: Iterable[bytes | memoryview], stream: IO[str] | None = None) -> None:
    """Write UTF-8 text pieces to a text stream (stdout by default).

    The bytes go to the stream's binary buffer when it has one (no decoding and
    re-encoding of a large text), else they are decoded and written as text.
    """
    out = sys.stdout if stream is None else stream
    buffer = getattr(out, "buffer", None)
    out.flush()  # text written before stays before
    for piece in pieces:
        if buffer is None:
            out.write(str(piece, "utf-8"))
        else:
            buffer.write(piece)
    if buffer is not None:
        buffer.flush()


def refuse_non_finite(obj: object) -> None:
    """ValueError if a float anywhere in ``obj`` (dicts, lists, tuples) is NaN or infinite.

    A list of records is looked at column by column, and the floats of a column are
    summed (C speed): a finite sum proves them all finite; otherwise each is looked at,
    so that only a true NaN or infinity is refused.
    """
    _check_values([obj])


def _check_values(values: list[Any]) -> None:
    kinds = set(map(type, values))
    if FiniteRecords in kinds:
        values = [v for v in values if type(v) is not FiniteRecords]
        kinds.discard(FiniteRecords)
    if kinds <= _SCALARS:
        if float in kinds:
            _check_floats(values if len(kinds) == 1 else [v for v in values if type(v) is float])
        return
    if kinds <= {dict, _NONE}:
        _check_records(values if _NONE not in kinds else [v for v in values if v is not None])
        return
    if kinds <= {list, tuple, _NONE}:
        _check_values(list(chain.from_iterable(v for v in values if v is not None)))
        return
    for value in values:  # a mixture: each value on its own
        if isinstance(value, dict):
            _check_values(list(value.values()))
        elif isinstance(value, (list, tuple)):
            _check_values(list(value))
        elif isinstance(value, float):
            _check_floats([value])


def _check_records(records: list[dict[str, Any]]) -> None:
    """Records looked at column by column, those of each shape (key order) apart."""
    shapes = list(map(tuple, records))
    keys = shapes[0]
    if all(map(keys.__eq__, shapes)):
        groups = {keys: records}
    else:  # records of a few shapes (some with an extra key)
        groups = {}
        for shape, record in zip(shapes, records):
            groups.setdefault(shape, []).append(record)
    for shape, members in groups.items():
        for key in shape:
            _check_values(list(map(itemgetter(key), members)))


def _check_floats(floats: list[float]) -> None:
    if math.isfinite(sum(floats)):  # a sum overflowing to infinity falls through to the loop
        return
    for value in floats:
        if not math.isfinite(value):
            raise ValueError(f"Out of range float values are not JSON compliant: {value!r}")
