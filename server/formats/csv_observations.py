"""A plain CSV of total-station readings (one pointing a row, header row first) → ``SurveyData``.

Columns (header names, any case, any order; comma-separated, or semicolons when the header
holds no comma):

| column | meaning | required |
|---|---|---|
| station | instrument point | yes |
| target | target point | yes |
| hz | horizontal circle reading (direction) | one of hz, zenith, slope |
| zenith | zenith angle (face II beyond 180°) | |
| slope | slope distance | |
| face | 1 or 2 (also I/II, L/R); else inferred from the zenith | no |
| set | set (round) number or name | no |
| hi, ht | instrument and target height | no |

Angles are in the unit given to the command (dms ``D:M:S``, ``deg`` or ``gon``; a value may
carry its own ``deg``/``gon`` suffix), lengths in ``m``, ``ft`` or ``usft``.  Consecutive rows
of one station (and one hi) are one setup.  The CSV states no accuracies: the field book
written from it asks for them.
"""

from __future__ import annotations

import csv
import io
import math

from server.errors import FieldbookError, Issue
from server.formats.survey_records import FileUnits, RawReading, Source, SurveyData
from server.units import FILE_ANGLE_UNITS, FILE_LENGTH_UNITS, UnitError, parse_angle, parse_number

MAX_BYTES = 50 * 1024 * 1024
COLUMNS = ("station", "target", "hz", "zenith", "slope", "face", "set", "hi", "ht")
LENGTH_FACTORS = {"m": 1.0, "ft": 0.3048, "usft": 1200.0 / 3937.0}
_FACES = {"1": 1, "i": 1, "l": 1, "fl": 1, "2": 2, "ii": 2, "r": 2, "fr": 2}


class _Rows:
    def __init__(self, length_unit: str, angle_unit: str) -> None:
        self.length_factor = LENGTH_FACTORS[length_unit]
        self.angle_unit = angle_unit
        self.issues: list[Issue] = []
        self.warnings: list[tuple[int, str]] = []
        self.renamed: set[str] = set()

    def name(self, line: int, text: str) -> str:
        cleaned = _clean(text)
        if cleaned != text and text not in self.renamed:
            self.renamed.add(text)
            self.warnings.append(
                (
                    line,
                    f"point name '{text[:64]}' is written {cleaned} (a field book name has "
                    "no white space, =, # or quotes, at most 64 characters)",
                )
            )
        return cleaned

    def angle(self, line: int, column: str, text: str) -> float | None:
        if not text:
            return None
        try:
            value = parse_angle(text, self.angle_unit)
        except (UnitError, ValueError) as exc:
            self.issues.append(Issue(line, text, f"{column}: {exc}"))
            return None
        if not math.isfinite(value) or abs(value) > 4.0 * math.pi:
            self.issues.append(
                Issue(line, text, f"{column}: '{text[:40]}' is not an angle of a survey")
            )
            return None
        return value

    def length(self, line: int, column: str, text: str) -> float | None:
        if not text:
            return None
        try:
            value = parse_number(text) * self.length_factor
        except UnitError as exc:
            self.issues.append(Issue(line, text, f"{column}: {exc}"))
            return None
        if abs(value) > 1e8:
            self.issues.append(
                Issue(
                    line, text, f"{column}: '{text[:40]}' is larger than 100 000 km; check the unit"
                )
            )
            return None
        return value

    def reading(self, line: int, row: dict[str, str], setup: str) -> RawReading | None:
        station, target = row.get("station", ""), row.get("target", "")
        if not station or not target:
            self.issues.append(Issue(line, "", "a row needs a station and a target"))
            return None
        if station == target:
            self.issues.append(Issue(line, target, f"the target is the station {station}"))
            return None
        hz = self.angle(line, "hz", row.get("hz", ""))
        zenith = self.angle(line, "zenith", row.get("zenith", ""))
        slope = self.length(line, "slope", row.get("slope", ""))
        if slope is not None and slope < 0.001:
            self.issues.append(Issue(line, row["slope"], "slope: at least 1 mm"))
            return None
        if zenith is not None and not 0.0 <= zenith <= 2.0 * math.pi:
            self.issues.append(Issue(line, row["zenith"], "zenith: must lie in [0, 360°]"))
            return None
        written = row.get("face", "").lower()
        if written and written not in _FACES:
            self.issues.append(Issue(line, written, f"face: '{written[:20]}' is not 1 or 2"))
            return None
        face = _FACES.get(written) or (2 if zenith is not None and zenith > math.pi else 1)
        if hz is None and zenith is None and slope is None:
            if not self.issues or self.issues[-1].line != line:
                self.issues.append(Issue(line, "", "a row needs hz, zenith or slope"))
            return None
        return RawReading(
            setup,
            self.name(line, station),
            self.name(line, target),
            Source(line, "row", "csv"),
            hz=hz,
            zenith=zenith,
            slope=slope,
            face=face,
            set_id=row.get("set", ""),
            hi=self.length(line, "hi", row.get("hi", "")),
            ht=self.length(line, "ht", row.get("ht", "")),
        )


def _clean(name: str) -> str:
    cleaned = "".join("_" if c.isspace() or c in '=#"' else c for c in name)[:64]
    return cleaned if cleaned.lower() != "end" else f"_{cleaned}"


def read_csv_observations(
    data: bytes, source: str = "", *, length_unit: str = "m", angle_unit: str = "dms"
) -> SurveyData:
    """The readings of a CSV file as records in SI units; problems → ``FieldbookError``."""
    assert length_unit in FILE_LENGTH_UNITS and angle_unit in FILE_ANGLE_UNITS
    if len(data) > MAX_BYTES:
        raise FieldbookError(
            [Issue(1, "", f"the file has {len(data):,} bytes; at most {MAX_BYTES:,} are read")],
            source,
        )
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise FieldbookError([Issue(line, "", "this line is not UTF-8 text")], source) from None
    first = text.split("\n", 1)[0]
    delimiter = ";" if ";" in first and "," not in first else ","
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True)
    rows = _Rows(length_unit, angle_unit)
    try:
        header = [h.strip().lower() for h in next(reader, [])]
        problem = _check_header(header)
        if problem:
            raise FieldbookError([Issue(1, "", problem)], source)
        readings: list[RawReading] = []
        setup, key = "", ("", "")
        for values in reader:
            line = reader.line_num
            if not any(v.strip() for v in values):
                continue
            if len(values) != len(header):
                rows.issues.append(
                    Issue(line, "", f"{len(values)} fields; the header has {len(header)}")
                )
                continue
            row = {h: v.strip() for h, v in zip(header, values)}
            if (row.get("station", ""), row.get("hi", "")) != key:
                key, setup = (row.get("station", ""), row.get("hi", "")), f"row {line}"
            reading = rows.reading(line, row, setup)
            if reading is not None:
                readings.append(reading)
    except csv.Error as exc:
        raise FieldbookError(
            [Issue(reader.line_num or 1, "", f"not a readable CSV: {exc}")], source
        ) from None
    if rows.issues:
        raise FieldbookError(rows.issues[:50], source, count=len(rows.issues))
    if not readings:
        raise FieldbookError([Issue(1, "", "the file holds no rows of readings")], source)
    units = FileUnits(LENGTH_FACTORS[length_unit], 1.0, False, length_unit, angle_unit)
    return SurveyData(units=units, readings=tuple(readings), warnings=tuple(rows.warnings))


def _check_header(header: list[str]) -> str | None:
    unknown = [h for h in header if h not in COLUMNS]
    if unknown:
        return (
            f"unknown column '{unknown[0][:40]}'; the columns are "
            f"{', '.join(COLUMNS)} (a header row first)"
        )
    if len(set(header)) != len(header):
        return "a column is named twice in the header"
    if "station" not in header or "target" not in header:
        return "the header needs the columns station and target"
    if not {"hz", "zenith", "slope"} & set(header):
        return "the header needs at least one of hz, zenith, slope"
    return None
