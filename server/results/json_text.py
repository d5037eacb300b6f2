"""The JSON text of a result, byte for byte as ``json.dumps(obj, indent=2)`` writes it, faster.

With ``indent`` set, the standard library encodes in pure Python (its C
encoder only writes compact text), about 25 µs per observation of a large
result.  The C encoder does accept any item separator, so a container whose
values are all scalars is encoded in one C call with the separator
``",\\n" + indent``, and only the brackets are placed by hand.  Nested
containers recurse.  Scalars go through the same C encoder, so numbers and
strings are spelled exactly as ``json.dumps`` spells them
(``tests/test_sparse.py`` compares the two texts).
"""

from __future__ import annotations

import gc
import json
import math
from collections.abc import Callable, Iterable, Iterator, Sequence
from itertools import chain
from operator import itemgetter
from typing import Any

_INDENT = "  "
_SCALARS = (str, int, float, bool, type(None))


def dumps_indented(obj: object) -> str:
    """``json.dumps(obj, indent=2, allow_nan=False)``, computed faster."""
    # No cyclic garbage collection while the text is made: full collections would
    # walk every object of a large result again and again (see pipeline.paused_gc).
    was_enabled = gc.isenabled()
    if was_enabled:
        gc.disable()
    try:
        return "".join(_chunks(obj, 0))
    finally:
        if was_enabled:
            gc.enable()


def _is_flat(values: Iterable[Any]) -> bool:
    return all(isinstance(v, _SCALARS) for v in values)


def _flat_records(items: Sequence[Any]) -> bool:
    """True for a list of non-empty dicts with string keys and scalar values only."""
    if not all(type(item) is dict and item for item in items):
        return False
    kinds = set(map(type, chain.from_iterable(map(dict.values, items))))
    keys = set(map(type, chain.from_iterable(items)))
    return keys == {str} and all(issubclass(kind, _SCALARS) for kind in kinds)


def _records(items: Sequence[Any], level: int) -> str:
    """A list of flat dicts in one C-encoder call, its record boundaries re-indented.

    Encoded with the dicts' item separator throughout, a boundary between two
    records reads ``},<newline><indent>{``; a raw newline only ever comes from
    a separator (inside strings it is escaped), so those boundaries are found
    exactly, and each is rewritten with the list's own indentation.
    """
    outer = _INDENT * level
    list_indent = _INDENT * (level + 1)
    item_indent = _INDENT * (level + 2)
    text = _flat_encoder(level + 1).encode(list(items))
    boundary = "},\n" + item_indent + "{"
    body = text[2:-2].replace(
        boundary, "\n" + list_indent + "},\n" + list_indent + "{\n" + item_indent
    )
    return (
        "[\n" + list_indent + "{\n" + item_indent + body + "\n" + list_indent + "}\n" + outer + "]"
    )


_encode_str = json.encoder.encode_basestring_ascii  # what json.dumps uses (ensure_ascii)
_NONE = type(None)
_SPELL: dict[type, Callable[[Any], str]] = {
    str: _encode_str,
    int: int.__repr__,
    float: float.__repr__,
    bool: {True: "true", False: "false"}.__getitem__,
    _NONE: lambda value: "null",
}


def _spelled(column: Sequence[Any], kinds: set[type], level: int) -> list[str] | None:
    """Every value of one column as JSON text, or None if one is not a plain scalar.

    A column of dicts (or None) that are records themselves, as the ellipse of
    a point, is spelled as records whose braces sit at ``level``; a column of
    lists as the general path spells them.
    """
    if list in kinds or tuple in kinds:
        # as the marks of a misclosure: each list as the general path writes it
        if not kinds <= {list, tuple, _NONE}:
            return None
        lists = [v for v in column if v]
        if set(map(type, chain.from_iterable(lists))) <= {int}:
            # lists of plain ints (the lines of an observation's group): spelled directly
            inner = "\n" + _INDENT * (level + 1)
            head, sep, tail = "[" + inner, "," + inner, "\n" + _INDENT * level + "]"
            return [
                "null" if v is None else head + sep.join(map(int.__repr__, v)) + tail if v else "[]"
                for v in column
            ]
        return ["null" if v is None else "".join(_chunks(v, level)) for v in column]
    if dict in kinds:
        if not kinds <= {dict, _NONE}:
            return None
        records = [v for v in column if v is not None]
        texts = _record_texts(records, level)
        if texts is None:
            return None
        if len(records) == len(column):
            return texts
        spelled = iter(texts)
        return ["null" if v is None else next(spelled) for v in column]
    if not kinds <= _SPELL.keys():
        return None
    if float in kinds and not all(
        map(math.isfinite, column if len(kinds) == 1 else [v for v in column if type(v) is float])
    ):
        return None  # the standard path raises its own error for NaN and infinity
    if len(kinds) == 1:
        (kind,) = kinds
        if kind is _NONE:
            return ["null"] * len(column)
        return list(map(_SPELL[kind], column))
    spell = _SPELL
    return [spell[type(v)](v) for v in column]


def _columns(items: Sequence[Any], level: int) -> str | None:
    """A list of dicts sharing one key order, spelled column by column.

    Each column's scalars are spelled by the functions the C encoder uses
    (``float.__repr__``, ``int.__repr__``, ``encode_basestring_ascii``), and the
    records are laid out by one format string, so the text is what
    ``json.dumps(indent=2)`` writes (``tests/test_fast_paths.py`` compares them).
    None, for the general path, when the dicts differ in keys or hold lists.
    """
    texts = _record_texts(items, level + 1)
    if texts is None:
        return None
    list_indent = _INDENT * (level + 1)
    return "[\n" + list_indent + (",\n" + list_indent).join(texts) + "\n" + _INDENT * level + "]"


def _record_texts(items: Sequence[Any], level: int) -> list[str] | None:
    """The text of each dict, its braces at ``level``; None unless all share their keys."""
    if not items:
        return []
    if set(map(type, items)) != {dict}:
        return None
    keys = tuple(items[0])
    if len(keys) < 2 or not all(type(key) is str for key in keys):
        return None
    if not all(map(keys.__eq__, map(tuple, items))):
        return None
    columns = []
    for column in zip(*map(itemgetter(*keys), items)):
        spelled = _spelled(column, set(map(type, column)), level + 1)
        if spelled is None:
            return None
        columns.append(spelled)
    item_indent = _INDENT * (level + 1)
    fields = (",\n" + item_indent).join(
        _encode_str(key).replace("%", "%%") + ": %s" for key in keys
    )
    record = "{\n" + item_indent + fields + "\n" + _INDENT * level + "}"
    return [record % values for values in zip(*columns)]


_encoders: dict[int, json.JSONEncoder] = {}


def _flat_encoder(level: int) -> json.JSONEncoder:
    """An encoder whose item separator starts a new line at ``level`` + 1."""
    encoder = _encoders.get(level)
    if encoder is None:
        separator = ",\n" + _INDENT * (level + 1)
        encoder = json.JSONEncoder(separators=(separator, ": "), allow_nan=False)
        _encoders[level] = encoder
    return encoder


def _chunks(obj: object, level: int) -> Iterator[str]:
    if isinstance(obj, dict):
        if not obj:
            yield "{}"
            return
        inner = "\n" + _INDENT * (level + 1)
        if _is_flat(obj.values()) and all(isinstance(k, str) for k in obj):
            text = _flat_encoder(level).encode(obj)
            yield "{" + inner + text[1:-1] + "\n" + _INDENT * level + "}"
            return
        yield "{"
        first = True
        for key, value in obj.items():
            if not isinstance(key, str):
                raise TypeError(f"keys must be strings, not {type(key).__name__}")
            yield (inner if first else "," + inner) + _flat_encoder(level).encode(key) + ": "
            first = False
            yield from _chunks(value, level + 1)
        yield "\n" + _INDENT * level + "}"
    elif isinstance(obj, (list, tuple)):
        if not obj:
            yield "[]"
            return
        inner = "\n" + _INDENT * (level + 1)
        if _is_flat(obj):
            text = _flat_encoder(level).encode(list(obj))
            yield "[" + inner + text[1:-1] + "\n" + _INDENT * level + "]"
            return
        if type(obj[0]) is dict and (columns := _columns(obj, level)) is not None:
            yield columns
            return
        if _flat_records(obj):
            yield _records(obj, level)
            return
        yield "["
        first = True
        for value in obj:
            yield inner if first else "," + inner
            first = False
            yield from _chunks(value, level + 1)
        yield "\n" + _INDENT * level + "]"
    else:
        yield _flat_encoder(level).encode(obj)
