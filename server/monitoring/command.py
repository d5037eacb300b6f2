"""``stationfit monitor``: read the books, run the job, write JSON or text (cli.py dispatches).

Kept beside the job so that ``server/cli.py`` only declares the options.
"""

from __future__ import annotations

import argparse
import math
import sys
from datetime import UTC, date, datetime
from pathlib import Path

from server.errors import FieldbookError, NetworkError
from server.fieldbook.geodetic_header import read_epoch
from server.fieldbook.model import Fieldbook
from server.fieldbook.parser import parse_fieldbook
from server.monitoring.job import MonitoringOptions, monitor
from server.monitoring.output import monitoring_json, monitoring_text
from server.results.json_writer import write_json
from server.units import LENGTH_FACTORS, UnitError, parse_length, parse_number

PROGRAM = "stationfit monitor"


class UsageError(ValueError):
    """A monitor option that cannot be followed (exit 64)."""


def run_monitor(args: argparse.Namespace, ok: int, fieldbook: int, network: int, usage: int) -> int:
    """Run the command; the exit statuses are passed in by the command line."""
    paths: list[Path] = args.books
    if len(paths) < 2:
        print(f"{PROGRAM}: error: two or more field books are needed", file=sys.stderr)
        return usage
    books: list[Fieldbook] = []
    failed = False
    for path in paths:
        try:
            data = path.read_bytes()
        except OSError as exc:
            print(f"{path}: cannot read the file: {exc.strerror or exc}", file=sys.stderr)
            return usage
        try:
            books.append(parse_fieldbook(data, source=str(path)))
        except FieldbookError as exc:
            print(str(exc), file=sys.stderr)
            failed = True
    if failed:
        return fieldbook
    try:
        options = _options(args, books[0].length_unit)
    except (UsageError, UnitError) as exc:
        print(f"{PROGRAM}: error: {exc}", file=sys.stderr)
        return usage
    try:
        job = monitor(books, options)
    except FieldbookError as exc:
        print(str(exc), file=sys.stderr)
        return fieldbook
    except NetworkError as exc:
        print(f"{PROGRAM}: the epochs cannot be compared: {exc}", file=sys.stderr)
        return network
    if args.json:
        write_json(monitoring_json(job))
    else:
        sys.stdout.write(monitoring_text(job))
    return ok


def _options(args: argparse.Namespace, unit: str) -> MonitoringOptions:
    confidence = float(args.confidence)
    if not 0.5 <= confidence < 1.0:
        raise UsageError(f"--confidence {confidence:g}: give a probability from 0.5 to 0.999")
    return MonitoringOptions(
        confidence=confidence,
        period_days=None if args.period is None else read_period(args.period),
        threshold=None if args.threshold is None else read_threshold(args.threshold, unit),
        predict=None if args.predict is None else read_when(args.predict),
    )


def read_period(text: str) -> float:
    """Days, or hours with ``h`` (``12.42h``)."""
    hours = text.lower().endswith("h")
    value = parse_number(text[:-1] if hours else text)
    days = value / 24.0 if hours else value
    if not (math.isfinite(days) and days > 0.0):
        raise UsageError(f"--period {text}: give a positive number of days, or hours with h")
    return days


def read_threshold(text: str, unit: str) -> float:
    """A bare number in the book's unit, or a length with its unit, into the book's unit."""
    try:
        value = parse_number(text)
    except UnitError:
        value = parse_length(text) / LENGTH_FACTORS[unit]
    if not value > 0.0:
        raise UsageError(f"--threshold {text}: give a positive length")
    return value


def read_when(text: str) -> datetime:
    when = read_epoch(text)
    if isinstance(when, datetime):
        return when
    assert isinstance(when, date)
    return datetime(when.year, when.month, when.day, tzinfo=UTC)
