"""The result JSON as text: kept for ``bench/run.py``, which times this call.

New code uses ``server.results.json_writer`` (bytes, written straight to a stream).
"""

from __future__ import annotations

from server.results.json_writer import json_bytes


def dumps_indented(obj: object) -> str:
    """``obj`` as indented JSON text (see ``json_writer.json_bytes``)."""
    return json_bytes(obj).decode("utf-8")
