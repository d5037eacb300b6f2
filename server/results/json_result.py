"""The JSON text of a whole result, written a chunk of records at a time.

``to_json_dict`` holds every point and observation record at once: a million-mark
network's records would take a gigabyte.  Here the records are made from the columns
(``columns.py``) and encoded ``CHUNK`` at a time; the rest of the object is encoded as
``to_json_dict`` gives it.  The bytes are exactly ``json_bytes(result.to_json_dict())``
(``tests/test_result_columns.py`` compares them).
"""

from __future__ import annotations

import gc
from collections.abc import Iterator
from itertools import chain
from typing import IO

from server.results.columns import CHUNK, ObservationColumns, PointColumns
from server.results.json_writer import FiniteRecords, json_bytes, write_bytes
from server.results.types import AdjustmentResult

_RECORD_LISTS = ("points", "observations")
#: what encloses the records of ``_records``'s one-key object
_OPEN = b'{\n  "": [\n  '
_CLOSE = b"\n  ]\n}"


def write_result_json(result: AdjustmentResult, stream: IO[str] | None = None) -> None:
    """Write the result's JSON and a newline to a text stream (stdout by default)."""
    was_enabled = gc.isenabled()
    gc.disable()  # every record lives briefly: no collection walks them again and again
    try:
        # a piece is written as soon as it is made: the whole text is never held at once
        write_bytes(chain(result_json_chunks(result), (b"\n",)), stream)
    finally:
        if was_enabled:
            gc.enable()


def result_json_chunks(result: AdjustmentResult) -> Iterator[bytes | memoryview]:
    """The indented JSON of ``result.to_json_dict()`` in pieces.

    Results that carry rows, geodetic keys or design keys are encoded whole.
    """
    points, observations = result.points, result.observations
    if (
        not isinstance(points, PointColumns)
        or not isinstance(observations, ObservationColumns)
        or result.summary.geodetic_keys
        or result.summary.design
        or not points
        or not observations
    ):
        yield json_bytes(result.to_json_dict())
        return
    for columns in (points, observations):
        if not columns.all_finite():  # the whole dict finds and names the value
            yield json_bytes(result.to_json_dict())
            return
    document = result.to_json_dict(records=False)
    keys = list(document)
    at = keys.index("points")
    assert keys[at : at + 2] == list(_RECORD_LISTS)
    before = {key: document[key] for key in keys[:at]}
    after = {key: document[key] for key in keys[at + 2 :]}
    # {"a": …, <- before, its closing brace cut; the lists; after, its opening brace cut
    # (both encoded first, so that a value JSON cannot hold stops the text before it starts)
    head = json_bytes(before)[: -len(b"\n}")]
    tail = b",\n" + json_bytes(after)[len(b"{\n") :]
    yield head
    yield b',\n  "points": '
    yield from _records(points)
    yield b',\n  "observations": '
    yield from _records(observations)
    yield tail


def _records(columns: PointColumns | ObservationColumns) -> Iterator[bytes | memoryview]:
    """A list of records at the document's second level, ``CHUNK`` records per piece."""
    yield b"[\n"
    for start in range(0, len(columns), CHUNK):
        # finite: checked on the columns before the first piece
        chunk = FiniteRecords(columns.json_records(start, min(start + CHUNK, len(columns))))
        # encoded as the value of a one-key object, the records come out already indented for
        # the document's second level: '{\n  "": [\n    {…},\n    {…}\n  ]\n}'
        encoded = json_bytes({"": chunk})
        yield b",\n  " if start else b"  "
        # a view: the chunk's text (tens of megabytes) is not copied to cut its ends
        yield memoryview(encoded)[len(_OPEN) : -len(_CLOSE)]
    yield b"\n  ]"
