"""Readers of the geodetic header and point values: ``crs``, ``geoid``, ``refraction``,
``epoch`` and a point's ``lat=``/``lon=``/``geoid=``.

Each reads one token's text and returns SI (radians, metres) or raises ``UnitError``
with a sentence for the surveyor; ``parser.py`` puts them on their line.  The EPSG
code is checked for its spelling only: the CRS itself is resolved later, by the
geodesy, so that a field book can be read without a CRS database.
"""

from __future__ import annotations

import re
from datetime import UTC, date, datetime, timedelta

from server.fieldbook.lexer import observed_angle, option_length, show
from server.units import RAD_PER_DEG, UnitError, parse_number

#: Plausibility bounds of the refraction coefficient k.  Over open ground k is about 0.13
#: by day; grazing lines over hot or cold surfaces reach a few tenths either side.  A value
#: beyond ±1 is a typing mistake (k=13 for 0.13), not air.
REFRACTION_LIMITS = (-1.0, 1.0)
#: Largest geoid undulation accepted (metres).  The Earth's geoid stays within about
#: -107 m to +86 m of the ellipsoid (global geoid models; figures from memory), so a larger
#: value is a unit or sign mistake.
MAX_UNDULATION_M = 150.0

_EPSG = re.compile(r"epsg:([0-9]{1,9})\Z", re.IGNORECASE)
_EPOCH = re.compile(
    r"([0-9]{4})-([0-9]{2})-([0-9]{2})"
    r"(?:[Tt]([0-9]{2}):([0-9]{2})(?::([0-9]{2})(\.[0-9]{1,6})?)?([Zz]|[+-][0-9]{2}:?[0-9]{2})?)?\Z"
)


def read_epsg(text: str) -> int:
    """The code of ``EPSG:CODE`` (any case), digits only."""
    match = _EPSG.match(text)
    if match is not None:
        return int(match.group(1))
    if text.isascii() and text.isdigit():
        raise UnitError(f"'{show(text)}': write the code with its authority, crs EPSG:{text}")
    raise UnitError(
        f"'{show(text)}' is not a coordinate reference system of a field book; write "
        "'crs EPSG:CODE' with the EPSG code of the projected CRS of the coordinates "
        "(e.g. crs EPSG:32633) or 'crs local lat=LAT lon=LON' for a site grid"
    )


def read_latitude(text: str, unit: str) -> float:
    """A latitude in the file's angle unit (south negative), radians in [-π/2, π/2]."""
    return _bounded_angle(text, unit, 90.0, "a latitude", "south")


def read_longitude(text: str, unit: str) -> float:
    """A longitude in the file's angle unit (west negative), radians in [-π, π]."""
    return _bounded_angle(text, unit, 180.0, "a longitude", "west")


def _bounded_angle(text: str, unit: str, limit_deg: float, what: str, negative: str) -> float:
    value = observed_angle(text, unit)
    # An exact 90° or 180° written in gon or dms may round a hair past the bound.
    slack = 1e-12
    if abs(value) > limit_deg * RAD_PER_DEG + slack:
        raise UnitError(
            f"'{show(text)}': {what} lies between -{limit_deg:g}° and {limit_deg:g}° "
            f"({negative} negative); this is {value / RAD_PER_DEG:.6g}°"
        )
    return max(-limit_deg * RAD_PER_DEG, min(limit_deg * RAD_PER_DEG, value))


def read_undulation(text: str) -> float:
    """A geoid undulation N with its length unit (``-28.41m``), metres, within ±150 m."""
    value = option_length(text)
    if abs(value) > MAX_UNDULATION_M:
        raise UnitError(
            f"'{show(text)}' is {value:.6g} m, but the geoid departs from the ellipsoid by "
            f"less than {MAX_UNDULATION_M:g} m everywhere; check the number, its unit and "
            "its sign (N = ellipsoidal height − orthometric height)"
        )
    return value


def read_refraction(text: str) -> float:
    """The coefficient of refraction k, a plain number within ``REFRACTION_LIMITS``."""
    value = parse_number(text)
    low, high = REFRACTION_LIMITS
    if not low <= value <= high:
        raise UnitError(
            f"'{show(text)}': a coefficient of refraction is a small number such as 0.13 "
            f"(k=0 turns the correction off); values outside {low:g} to {high:g} are not "
            "plausible"
        )
    return value


def read_epoch(text: str) -> date | datetime:
    """``2026-03-14`` as a ``date``; ``2026-03-14T10:30Z`` as a UTC ``datetime``."""
    example = "write a date as 2026-03-14 or a UTC time as 2026-03-14T10:30Z"
    match = _EPOCH.match(text)
    if match is None:
        raise UnitError(f"'{show(text)}' is not a date or time; {example}")
    year, month, day, hour, minute, second, fraction, zone = match.groups()
    try:
        day_of = date(int(year), int(month), int(day))
    except ValueError:
        raise UnitError(f"'{show(text)}': there is no such day; {example}") from None
    if hour is None:
        return day_of
    if int(hour) > 23 or int(minute) > 59 or int(second or 0) > 59:
        raise UnitError(f"'{show(text)}': the time of day is out of range; {example}")
    micro = round(float(fraction) * 1e6) if fraction else 0
    moment = datetime(
        day_of.year,
        day_of.month,
        day_of.day,
        int(hour),
        int(minute),
        int(second or 0),
        min(micro, 999_999),
        tzinfo=UTC,
    )
    if zone is None:
        raise UnitError(
            f"'{show(text)}' has no time zone; the epoch is in UTC: write {text}Z if this is UTC"
        )
    if zone.upper() != "Z":
        sign = 1 if zone[0] == "+" else -1
        digits = zone[1:].replace(":", "")
        offset = timedelta(hours=int(digits[:2]), minutes=int(digits[2:]))
        if offset:
            utc = moment - sign * offset
            raise UnitError(
                f"'{show(text)}' is not in UTC; write the same moment as "
                f"{utc.strftime('%Y-%m-%dT%H:%M')}{_seconds(utc)}Z"
            )
    return moment


def _seconds(moment: datetime) -> str:
    if moment.second == 0 and moment.microsecond == 0:
        return ""
    return f":{moment.second:02d}" + (f".{moment.microsecond:06d}" if moment.microsecond else "")
