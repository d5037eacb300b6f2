"""Presentation of the geodetic figures of a result: the model, geodetic coordinates of the
points and the tests of whole baselines, formatted once for every output.

Only results with a ``crs`` line or of the geodetic model have any of these rows; for
others every function returns nothing, so plane reports are laid out as before.

Formats: latitude and longitude in decimal degrees to 9 decimals (about 0.1 mm), south
and west negative, as in the JSON; the scale factor to 9 decimals; the convergence in
D:M:S to 0.01″ for ``dms`` books, else decimal degrees to 7 decimals.
"""

from __future__ import annotations

from dataclasses import dataclass

from server.report.tables import (
    NOT_APPLICABLE,
    _fixed,
    fmt_length,
    fmt_ratio,
    length_label,
)
from server.results.result import AdjustmentResult
from server.units import format_dms

#: What the geodetic model assumes about the vertical, printed on every geodetic report.
DEFLECTION_NOTE = "deflections of the vertical taken as zero (up = the ellipsoid normal)"
#: Where the geoid undulations come from.
GEOID_SOURCE = "undulations N from the field book (H = h − N; 0 where none is given)"


@dataclass(frozen=True, slots=True)
class GeodeticPointRow:
    """One point's geodetic coordinates and projection factors, formatted."""

    name: str
    latitude: str
    longitude: str
    ellipsoidal_height: str
    geoid: str
    height: str
    scale_factor: str
    convergence: str


@dataclass(frozen=True, slots=True)
class BaselineTestRow:
    """The test of one baseline's residual vector, formatted."""

    line: int
    from_point: str
    to_point: str
    statistic: str
    critical: str
    flagged: bool
    status: str


def _degrees(value: float | None, decimals: int) -> str:
    return NOT_APPLICABLE if value is None else _fixed(value, decimals)


def fmt_convergence(value_deg: float | None, angle_unit: str) -> str:
    """Meridian convergence: signed D:M:S to 0.01″ for dms books, else decimal degrees."""
    if value_deg is None:
        return NOT_APPLICABLE
    if angle_unit == "dms":
        return format_dms(value_deg, 2)
    return _fixed(value_deg, 7)


def model_rows(result: AdjustmentResult) -> list[tuple[str, str, str]]:
    """(label, value, unit) rows that say which model, CRS, refraction and geoid were used."""
    s = result.summary
    if not s.geodetic_keys:
        return []
    out = [
        (
            "Model",
            "geodetic 3D (Earth-centred positions)"
            if result.geodetic
            else "plane (grid coordinates)",
            "",
        )
    ]
    out.append(("Coordinate reference system", s.crs or NOT_APPLICABLE, ""))
    if result.geodetic:
        k = NOT_APPLICABLE if s.refraction is None else f"{s.refraction:g}"
        out += [
            ("Refraction coefficient k", k, ""),
            ("Geoid", GEOID_SOURCE, ""),
            ("Vertical", DEFLECTION_NOTE, ""),
        ]
    return out


def geodetic_point_rows(
    result: AdjustmentResult, window: slice = slice(None)
) -> list[GeodeticPointRow]:
    """Latitude, longitude, h, N, H, scale factor and convergence of each point (with a CRS)."""
    if not result.summary.geodetic_keys:
        return []
    unit = result.length_unit
    return [
        GeodeticPointRow(
            name=p.name,
            latitude=_degrees(p.latitude, 9),
            longitude=_degrees(p.longitude, 9),
            ellipsoidal_height=fmt_length(p.ellipsoidal_height, unit),
            geoid=fmt_length(p.geoid, unit),
            height=fmt_length(p.height, unit),
            scale_factor=_degrees(p.scale_factor, 9),
            convergence=fmt_convergence(p.convergence, result.angle_unit),
        )
        for p in result.points[window]
    ]


def baseline_test_rows(result: AdjustmentResult) -> list[BaselineTestRow]:
    """One row per tested baseline, in file order."""
    return [
        BaselineTestRow(
            line=t.line,
            from_point=t.from_point,
            to_point=t.to_point,
            statistic=fmt_ratio(t.statistic),
            critical=fmt_ratio(t.critical),
            flagged=t.flagged,
            status="flagged" if t.flagged else "ok",
        )
        for t in result.baseline_tests
    ]


def geodetic_note(result: AdjustmentResult) -> str:
    """How to read the geodetic columns (empty for a plane result without a CRS)."""
    if not result.summary.geodetic_keys:
        return ""
    unit = length_label(result.length_unit)
    text = (
        f"Latitude and longitude in decimal degrees (south and west negative); heights in "
        f"{unit}: ellipsoidal h, geoid undulation N and orthometric H = h − N. Scale factor: "
        "the projection's point scale factor; convergence: grid north minus true north."
    )
    if result.geodetic:
        text += (
            " Standard deviations and ellipses are along local east, north and up (the "
            "ellipsoid normal); ellipse azimuths are clockwise from true north, and a "
            "relative ellipse is in the local axes at the first point of its pair."
        )
    return text


def baseline_test_note(result: AdjustmentResult) -> str:
    """The baseline test in words, with its critical value."""
    if not result.baseline_tests:
        return ""
    critical = fmt_ratio(result.baseline_tests[0].critical)
    return (
        "Each baseline's three residual components tested together: vᵀ·Qv⁺·v (Qv the "
        "baseline's 3×3 cofactor block of the residuals, pseudo-inverse where it is "
        "singular; components with redundancy below 0.001 left out), flagged above the "
        f"χ²(3) quantile at 1 − α₀ = {critical}. Each component also has its own w-test in "
        "the observations table, which allows for the correlations within the baseline."
    )


def geodetic_context(result: AdjustmentResult, window: slice = slice(None)) -> dict[str, object]:
    """The template keys of the geodetic parts (empty lists and strings for plane results)."""
    return {
        "model_rows": model_rows(result),
        "geodetic_point_rows": geodetic_point_rows(result, window),
        "geodetic_note": geodetic_note(result),
        "baseline_test_rows": baseline_test_rows(result),
        "baseline_test_note": baseline_test_note(result),
    }
