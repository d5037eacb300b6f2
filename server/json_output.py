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

import json
from collections.abc import Iterator
from itertools import chain

_INDENT = "  "
_SCALARS = (str, int, float, bool, type(None))


def dumps_indented(obj: object) -> str:
    """``json.dumps(obj, indent=2, allow_nan=False)``, computed faster."""
    return "".join(_chunks(obj, 0))


def _is_flat(values) -> bool:
    return all(isinstance(v, _SCALARS) for v in values)


def _flat_records(items) -> bool:
    """True for a list of non-empty dicts with string keys and scalar values only."""
    if not all(type(item) is dict and item for item in items):
        return False
    kinds = set(map(type, chain.from_iterable(map(dict.values, items))))
    keys = set(map(type, chain.from_iterable(items)))
    return keys == {str} and all(issubclass(kind, _SCALARS) for kind in kinds)


def _records(items, level: int) -> str:
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
    return "[\n" + list_indent + "{\n" + item_indent + body + "\n" + list_indent + "}\n" + outer + "]"


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
