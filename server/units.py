"""Units: the only place where a unit factor or an angle convention is written down.

Everything inside the numerical core is SI: lengths in metres, angles in
radians.  Input is converted once by the parser and output once by
``result.py``.

Sources for the factors:

* international foot = 0.3048 m exactly, and the US survey foot =
  1200/3937 m (NIST and NOAA/NGS, 85 FR 62698, 2020);
* 400 gon to the circle (ISO 80000-3).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

#: Metres per length unit accepted in a field book.
LENGTH_FACTORS: dict[str, float] = {
    "mm": 1e-3,
    "cm": 1e-2,
    "m": 1.0,
    "km": 1e3,
    "ft": 0.3048,
    "usft": 1200.0 / 3937.0,
}

#: Units a field book may declare for coordinates and observed lengths.
FILE_LENGTH_UNITS = ("m", "ft", "usft")
#: Units a field book may declare for observed angles.
FILE_ANGLE_UNITS = ("dms", "deg", "gon")

RAD_PER_DEG = math.pi / 180.0
RAD_PER_GON = math.pi / 200.0
ARCSEC_PER_RAD = 180.0 * 3600.0 / math.pi
RAD_PER_ARCSEC = 1.0 / ARCSEC_PER_RAD
RAD_PER_MGON = RAD_PER_GON / 1000.0
TWO_PI = 2.0 * math.pi

# ASCII digits only: \d would also accept other scripts' digits, which float() reads
_NUMBER = r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?"
_NUMBER_RE = re.compile(rf"^{_NUMBER}$")
_LENGTH_RE = re.compile(rf"^({_NUMBER})([a-zA-Z]+)$")
_DMS_RE = re.compile(r"^(-)?([0-9]{1,6}):([0-9]{1,6}):([0-9]{1,6}(?:\.[0-9]*)?)$")


class UnitError(ValueError):
    """A value or unit could not be read; the message is a sentence for the user."""


def parse_number(text: str) -> float:
    """Read a plain decimal number; ``nan``, ``inf`` and commas are refused."""
    if not _NUMBER_RE.match(text):
        if text.lower().lstrip("+-") in {"nan", "inf", "infinity"}:
            raise UnitError(f"'{text}' is not a finite number")
        raise UnitError(f"'{text}' is not a number (use a point as the decimal separator)")
    value = float(text)
    if not math.isfinite(value):
        raise UnitError(f"'{text}' is too large to be a number")
    return value


def parse_length(text: str) -> float:
    """Read a length that carries its unit (``420m``, ``0.42km``, ``3.5ft``) into metres."""
    match = _LENGTH_RE.match(text)
    if not match:
        parse_number(text)  # a bare number gets the more useful message below
        raise UnitError(f"'{text}' needs a length unit, e.g. {text}m")
    unit = match.group(2).lower()
    if unit not in LENGTH_FACTORS:
        raise UnitError(f"'{match.group(2)}' is not a length unit (use mm, cm, m, km, ft or usft)")
    return parse_number(match.group(1)) * LENGTH_FACTORS[unit]


def parse_angle(text: str, unit: str) -> float:
    """Read an angle in the file's unit, or with its own ``deg``/``gon`` suffix, into radians."""
    lowered = text.lower()
    for suffix, factor in (("deg", RAD_PER_DEG), ("gon", RAD_PER_GON)):
        if lowered.endswith(suffix) and len(lowered) > len(suffix):
            return parse_number(text[: -len(suffix)]) * factor
    if unit == "dms":
        return parse_dms(text)
    if unit == "deg":
        return parse_number(text) * RAD_PER_DEG
    if unit == "gon":
        return parse_number(text) * RAD_PER_GON
    raise ValueError(f"unknown angle unit {unit!r}")


def parse_dms(text: str) -> float:
    """Read ``D:M:S`` (whole degrees, minutes < 60, seconds < 60) into radians."""
    match = _DMS_RE.match(text)
    if not match:
        if (packed := packed_dms(text)) is not None:
            meaning = f"if it means {_spoken(packed)}, " if "." in text else ""
            raise UnitError(f"'{text}' is not in D:M:S; {meaning}write {packed}")
        if _NUMBER_RE.match(text):
            raise UnitError(
                f"'{text}' is not in D:M:S; write it as degrees:minutes:seconds "
                "or add a unit suffix (deg or gon)"
            )
        raise UnitError(f"'{text}' is not an angle in D:M:S (e.g. 87:14:31.5)")
    sign, degrees, minutes, seconds = match.groups()
    if int(minutes) >= 60:
        raise UnitError(f"'{text}': minutes must be below 60")
    if float(seconds) >= 60.0:
        raise UnitError(f"'{text}': seconds must be below 60")
    return _dms_radians(sign, degrees, minutes, seconds)


def plain_dms(text: str) -> float | None:
    """``parse_dms`` of a D:M:S it accepts, in radians; None for anything else (no message:
    the caller reads such a text the careful way)."""
    match = _DMS_RE.match(text)
    if match is None:
        return None
    sign, degrees, minutes, seconds = match.groups()
    if int(minutes) >= 60 or float(seconds) >= 60.0:
        return None
    return _dms_radians(sign, degrees, minutes, seconds)


def _dms_radians(sign: str | None, degrees: str, minutes: str, seconds: str) -> float:
    value = (int(degrees) + int(minutes) / 60.0 + float(seconds) / 3600.0) * RAD_PER_DEG
    return -value if sign else value


# A calculator's D.MMSS (291.1650 = 291°16'50"), or whole degrees: at least two decimals,
# so that a decimal-degree value such as 12.5 is not read as minutes.
_PACKED_DMS_RE = re.compile(r"^(-)?([0-9]{1,3})(?:\.([0-9]{2,}))?$")


def packed_dms(text: str) -> str | None:
    """``291:16:50`` for ``291.1650`` (D.MMSS) and ``90:00:00`` for ``90``; None if not one."""
    match = _PACKED_DMS_RE.match(text)
    if not match:
        return None
    sign, degrees, decimals = match.groups()
    decimals = decimals or "0000"
    minutes, seconds, fraction = decimals[:2], decimals[2:4].ljust(2, "0"), decimals[4:]
    if int(degrees) > 360 or int(minutes) >= 60 or int(seconds) >= 60:
        return None
    return f"{sign or ''}{int(degrees)}:{minutes}:{seconds}{'.' + fraction if fraction else ''}"


def _spoken(dms: str) -> str:
    """``291:16:50`` as ``291° 16′ 50″`` for a message."""
    degrees, minutes, seconds = dms.split(":")
    return f"{degrees}° {minutes}′ {seconds}″"


def wrap_2pi(angle_rad: float) -> float:
    """Reduce an angle to [0, 2π)."""
    reduced = math.fmod(angle_rad, TWO_PI)
    if reduced < 0.0:
        reduced += TWO_PI
    # fmod of a tiny negative value can round up to exactly 2π
    return 0.0 if reduced >= TWO_PI else reduced


def wrap_2pi_array(angles_rad: np.ndarray) -> np.ndarray:
    """``wrap_2pi`` of each angle, by the same operations (so to the same bits)."""
    reduced = np.fmod(angles_rad, TWO_PI)
    reduced = np.where(reduced < 0.0, reduced + TWO_PI, reduced)
    return np.where(reduced >= TWO_PI, 0.0, reduced)


def wrap_pi(angle_rad: float) -> float:
    """Reduce an angle to (−π, π]."""
    reduced = math.remainder(angle_rad, TWO_PI)
    return math.pi if reduced == -math.pi else reduced


def format_dms(angle_deg: float, decimals: int = 1, *, wrap: bool = False) -> str:
    """Format decimal degrees as ``D:MM:SS.s``, carrying rounded seconds into minutes.

    With ``wrap``, an angle that rounds up to a full circle is written 0:00:00.
    """
    sign = "-" if angle_deg < 0 else ""
    scale = 10**decimals
    total = round(abs(angle_deg) * 3600.0 * scale)
    whole_seconds, fraction = divmod(total, scale)
    minutes_total, seconds = divmod(whole_seconds, 60)
    degrees, minutes = divmod(minutes_total, 60)
    if wrap and degrees >= 360 and sign == "":
        degrees -= 360
    if total == 0 or (degrees, minutes, seconds, fraction) == (0, 0, 0, 0):
        sign = ""
    frac = f".{fraction:0{decimals}d}" if decimals > 0 else ""
    return f"{sign}{degrees}:{minutes:02d}:{seconds:02d}{frac}"


@dataclass(frozen=True, slots=True)
class Quantity:
    """A standard deviation or allowance as written, in SI parts.

    ``constant`` is metres (or radians when ``angular``); ``ppm`` applies to a
    distance; ``per_sqrtkm`` and ``per_setup`` are metres for leveling.  How
    the parts combine is decided by the caller: in quadrature for a standard
    deviation (``model/kinds.py``), linearly for an allowance (below).
    """

    constant: float = 0.0
    ppm: float = 0.0
    per_sqrtkm: float = 0.0
    per_setup: float = 0.0
    angular: bool = False

    def allowance_level(self, length_km: float | None, setups: int | None) -> float | None:
        """Allowed misclosure c + k·√L + s·√K (parts added linearly); None if a part lacks data."""
        if (self.per_sqrtkm and length_km is None) or (self.per_setup and setups is None):
            return None
        return (
            self.constant
            + self.per_sqrtkm * math.sqrt(length_km or 0.0)
            + self.per_setup * math.sqrt(setups or 0)
        )

    def allowance_distance(self, distance_m: float) -> float:
        """Allowance a + b·D·10⁻⁶ (parts added linearly, as published standards state them)."""
        return self.constant + self.ppm * 1e-6 * distance_m


_TERM_RE = re.compile(rf"({_NUMBER})([a-zA-Z/]+)")
#: Ways of marking an angle that are not units of a standard deviation, in arc-seconds.
_ANGLE_MARKS = {
    '"': 1.0,
    "''": 1.0,
    "″": 1.0,
    "s": 1.0,
    "secs": 1.0,
    "arcsec": 1.0,
    "'": 60.0,
    "′": 60.0,
    "min": 60.0,
    "°": 3600.0,
    "deg": 3600.0,
}
_MARKED_RE = re.compile(rf"^({_NUMBER})(\"|''|″|'|′|°|[a-zA-Z]+)$")


def angle_in_sec(text: str) -> str | None:
    """``5sec`` for ``5"``, ``5''``, ``5″`` or ``5s``, ``300sec`` for ``5'``; None otherwise.

    Standard deviations are written ``5sec``; the marks of a field sheet are not units.
    ``cc`` (centesimal seconds, 0.1 mgon each) becomes mgon.
    """
    match = _MARKED_RE.match(text)
    if match is None:
        return None
    number, mark = match.groups()
    if mark.lower() == "cc":
        return f"{float(number) / 10.0:g}mgon"
    factor = _ANGLE_MARKS.get(mark.lower())
    return None if factor is None else f"{float(number) * factor:g}sec"


def _term_unit(written: str) -> tuple[str, float, bool]:
    """The unit of one term → (which part of the quantity, factor to SI, angular?)."""
    unit = written.lower()
    if unit == "ppm":
        return "ppm", 1.0, False
    if unit == "sec":
        return "constant", RAD_PER_ARCSEC, True
    if unit == "mgon":
        return "constant", RAD_PER_MGON, True
    if unit in LENGTH_FACTORS:
        return "constant", LENGTH_FACTORS[unit], False
    base, slash, per = unit.partition("/")
    if slash and base in LENGTH_FACTORS:
        if per in ("sqrtkm", "setup"):
            return f"per_{per}", LENGTH_FACTORS[base], False
        raise UnitError(f"'{written}': use /sqrtkm or /setup after a length")
    raise UnitError(
        f"'{written}' is not a unit here "
        "(use mm, cm, m, km, ft, usft, ppm, sec, mgon, mm/sqrtkm or mm/setup)"
    )


def parse_quantity(text: str) -> Quantity:
    """Read ``2mm+2ppm``, ``1.0mm/sqrtkm``, ``0.5mm+0.4mm/setup``, ``1.5sec`` or ``0.3mgon``.

    Each term is a number with its unit, terms joined by ``+``.  Raises
    ``UnitError`` with a sentence naming the bad part.
    """
    if not text:
        raise UnitError("a value is missing")
    parts: dict[str, float] = {"constant": 0.0, "ppm": 0.0, "per_sqrtkm": 0.0, "per_setup": 0.0}
    angular: bool | None = None
    position = 0
    while position < len(text):
        match = _TERM_RE.match(text, position)
        if not match:
            rest = text[position:]
            if _NUMBER_RE.match(rest):
                raise UnitError(f"'{text}' needs a unit, e.g. {rest}mm or {rest}sec")
            raise UnitError(f"'{text}' is not a quantity with units (e.g. 2mm+2ppm, 1.5sec)")
        number = parse_number(match.group(1))
        key, factor, is_angle = _term_unit(match.group(2))
        if angular is not None and angular != is_angle:
            raise UnitError(f"'{text}' mixes angular and length units")
        angular = is_angle
        parts[key] += number * factor
        position = match.end()
        if position < len(text):
            if text[position] != "+":
                raise UnitError(f"'{text}': join the parts with '+'")
            position += 1
            if position == len(text):
                raise UnitError(f"'{text}' ends with '+'")
    return Quantity(angular=bool(angular), **parts)


def parse_angular_allowance(text: str) -> float:
    """``10sec/sqrtn`` or ``3mgon/sqrtn`` → K in radians (the allowance is K·√n)."""
    base, slash, per = text.partition("/")
    if not slash or per.lower() != "sqrtn":
        raise UnitError(
            f"'{text}': an angular closure allowance is an angle per root of the number of "
            "angle stations, like 10sec/sqrtn or 3mgon/sqrtn"
        )
    value = parse_quantity(base)
    if not value.angular or value.constant <= 0.0:
        raise UnitError(
            f"'{text}': write the angle in sec or mgon and above zero, like 10sec/sqrtn"
        )
    if value.constant > math.radians(1.0):
        raise UnitError(
            f"'{text}': more than 1 degree per station is not plausible; check the unit"
        )
    return value.constant


def parse_ratio(text: str) -> float:
    """``1:10000`` → 10000 (the precision ratio 1 : N a traverse must reach)."""
    one, colon, rest = text.partition(":")
    try:
        number = float(rest) if colon and one.strip() == "1" else math.nan
    except ValueError:
        number = math.nan
    if not math.isfinite(number):
        raise UnitError(f"'{text}': write the precision ratio as 1:N, like ratio=1:10000")
    if not 1.0 <= number <= 1e9:
        raise UnitError(f"'{text}': N in 1:N must be between 1 and 1000000000")
    return number
