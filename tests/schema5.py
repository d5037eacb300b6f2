"""A data folder's database as Stationfit wrote it at schema 5 (before accounts), for the
upgrade tests: the version-5 statements the store still keeps as the base of its schema."""

from __future__ import annotations

import sqlite3
from contextlib import closing
from pathlib import Path

from server.store.schema import SQLITE_BASELINE as _SCHEMA  # the schema-5 statements


def make_schema_5(path: Path) -> None:
    """An empty schema-5 database at ``path``."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with closing(sqlite3.connect(path)) as raw:
        for statement in _SCHEMA:
            raw.execute(statement)
        raw.execute("PRAGMA user_version = 5")
        raw.commit()
