"""The adjusted points as CSV, safe to open in a spreadsheet."""

from __future__ import annotations

import csv
import io

from server.report.tables import _FORMULA_STARTS, LENGTH_DECIMALS, _fixed
from server.results.result import AdjustmentResult

# --------------------------------------------------------------------------------------
# CSV


def safe_cell(text: str) -> str:
    """A text cell that a spreadsheet will not run as a formula (leading apostrophe)."""
    return "'" + text if text.startswith(_FORMULA_STARTS) else text


def _number(value: float | None, decimals: int) -> str:
    return "" if value is None else _fixed(value, decimals)


POINT_CSV_HEADER = (
    "name",
    "east",
    "north",
    "height",
    "sd_east",
    "sd_north",
    "sd_height",
    "fixed",
    "weighted",
    "semi_major",
    "semi_minor",
    "azimuth",
    "note",
)


#: Columns after ``height`` when the result has a CRS: degrees to 9 decimals (about 0.1 mm),
#: heights in the file's unit, the scale factor to 9 and the convergence (degrees) to 7.
GEODETIC_CSV_HEADER = (
    "latitude",
    "longitude",
    "ellipsoidal_height",
    "geoid",
    "scale_factor",
    "convergence",
)


def points_csv(result: AdjustmentResult) -> str:
    """Adjusted points as CSV; text cells are guarded against formula injection, numbers are not.

    With a CRS the geodetic columns follow ``height``; without one the columns are as before.
    """
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\r\n")
    geodetic = result.summary.geodetic_keys
    header = list(POINT_CSV_HEADER)
    if geodetic:
        header[4:4] = GEODETIC_CSV_HEADER
    writer.writerow(header)
    places = LENGTH_DECIMALS.get(result.length_unit, 4)
    for p in result.points:
        e = p.ellipse
        extra = (
            [
                _number(p.latitude, 9),
                _number(p.longitude, 9),
                _number(p.ellipsoidal_height, places),
                _number(p.geoid, places),
                _number(p.scale_factor, 9),
                _number(p.convergence, 7),
            ]
            if geodetic
            else []
        )
        writer.writerow(
            [
                safe_cell(p.name),
                _number(p.east, places),
                _number(p.north, places),
                _number(p.height, places),
                *extra,
                _number(p.sd_east, places),
                _number(p.sd_north, places),
                _number(p.sd_height, places),
                safe_cell(p.fixed),
                safe_cell(p.weighted),
                _number(e.semi_major if e else None, places),
                _number(e.semi_minor if e else None, places),
                _number(e.azimuth if e else None, 4),
                safe_cell(p.note),
            ]
        )
    return buffer.getvalue()
