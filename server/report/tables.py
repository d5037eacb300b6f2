"""Presentation of an adjustment result: the rows of formatted figures, built once.

Nothing here computes a figure.  Every number comes from the frozen
``AdjustmentResult`` and is only rounded for display:

* lengths (coordinates, heights, height differences, residuals, standard
  deviations, ellipse axes) to 4 decimals in the file's unit (0.1 mm in metres);
  the length of a leveling route, a sum of booked section lengths, to 1 decimal;
* angle values in D:M:S when the field book uses ``dms``, else in decimal
  degrees (the unit of the result contract);
* angular residuals, standard deviations and MDBs in arc-seconds to 0.1″;
* w-statistics and redundancy numbers to 2 decimals.

The row helpers (``rows``, ``point_rows``, ``observation_rows``,
``misclosure_rows`` …) are shared by the HTML report (``html.py``), the text
summary (``text.py``), the CSV (``csv_export.py``) and the web pages, so every
output shows the same figures the same way.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, replace

from server import __version__
from server.report.histogram import layout as histogram_layout
from server.report.histogram import w_histogram
from server.results.result import AdjustmentResult, ObservationResult, PointResult, RelativeResult
from server.review.standards import Preset
from server.units import format_dms

#: Folder of the report templates and of the CSS that is inlined into the report.

#: Shown where a figure does not apply.
NOT_APPLICABLE = "—"

LENGTH_DECIMALS = {"m": 4, "ft": 4, "usft": 4}
LENGTH_LABELS = {"m": "m", "ft": "ft", "usft": "US ft"}
ANGLE_LABELS = {"dms": "D:M:S", "deg": "decimal degrees", "gon": "decimal degrees"}
ARCSEC = "″"
DIMENSION_LABELS = {
    1: "1D — heights",
    2: "2D — horizontal positions",
    3: "3D — positions and heights",
}
COMPONENT_LABELS = {"en": "position", "h": "height", "enh": "position and height"}

#: Characters that make a spreadsheet treat a text cell as a formula.
_FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


# --------------------------------------------------------------------------------------
# number formatting


def _fixed(value: float, decimals: int) -> str:
    """A float with a fixed number of decimals, never printing "-0.000"."""
    text = f"{value:.{decimals}f}"
    if text.startswith("-") and not text.strip("-0."):
        text = text[1:]
    return text


def fmt_length(value: float | None, unit: str, *, blank: str = NOT_APPLICABLE) -> str:
    """A length in the file's unit to 0.1 mm (4 decimals)."""
    return blank if value is None else _fixed(value, LENGTH_DECIMALS.get(unit, 4))


def fmt_route_length(value: float | None, *, blank: str = NOT_APPLICABLE) -> str:
    """The length of a leveling route (a sum of ``len=``) to 0.1 of the unit."""
    return blank if value is None else _fixed(value, 1)


def fmt_angle(value_deg: float | None, angle_unit: str, *, blank: str = NOT_APPLICABLE) -> str:
    """An angle value: D:M:S for dms field books, else decimal degrees to 6 decimals."""
    if value_deg is None:
        return blank
    if angle_unit == "dms":
        return format_dms(value_deg, 1, wrap=True)
    return _fixed(value_deg, 6)


def fmt_booked_angle(value_deg: float | None, angle_unit: str) -> str:
    """A booked angle as written: like ``fmt_angle`` but never brought into [0°, 360°)."""
    if value_deg is None:
        return NOT_APPLICABLE
    if angle_unit == "dms":
        return format_dms(value_deg, 1)
    return _fixed(value_deg, 6)


def fmt_scale(factor: float) -> str:
    """A scale factor with the digits it was given to (at most 10 significant)."""
    return f"{factor:.10g}"


def reduction_text(o: ObservationResult) -> str:
    """What turned the booked value into the value used: "× k" for a scaled distance,
    "± n·360°" for an angle booked outside one turn, else "—" (used as booked)."""
    if o.scale_factor is not None and o.scale_factor != 1.0:
        return f"× {fmt_scale(o.scale_factor)}"
    if o.angular and o.kind != "zenith" and o.booked is not None and o.observed is not None:
        turns = round((o.observed - o.booked) / 360.0)
        if turns:
            return f"{'+' if turns > 0 else '−'} {abs(turns) * 360}°"
    return NOT_APPLICABLE


def reductions_note(result: AdjustmentResult) -> str:
    """One sentence naming the scale factors applied to distances, or "" when none was."""
    factors = sorted(
        {
            o.scale_factor
            for o in result.observations
            if o.scale_factor is not None and o.scale_factor != 1.0
        }
    )
    if not factors:
        return ""
    listed = ", ".join(fmt_scale(f) for f in factors)
    noun = "factor" if len(factors) == 1 else "factors"
    count = sum(
        1 for o in result.observations if o.scale_factor is not None and o.scale_factor != 1.0
    )
    return (
        f"{count} booked distance{'s' if count != 1 else ''} reduced by the scale {noun} "
        f"{listed} (used = booked × factor)."
    )


def fmt_arcsec(value: float | None, *, blank: str = NOT_APPLICABLE) -> str:
    """Arc-seconds to 0.1″."""
    return blank if value is None else _fixed(value, 1)


def fmt_w(value: float | None, *, blank: str = NOT_APPLICABLE) -> str:
    """A w-statistic to 2 decimals."""
    return blank if value is None else _fixed(value, 2)


def fmt_ratio(value: float | None, decimals: int = 2, *, blank: str = NOT_APPLICABLE) -> str:
    """A dimensionless figure (redundancy number, test statistic) to ``decimals``."""
    return blank if value is None else _fixed(value, decimals)


def fmt_azimuth(value_deg: float | None, angle_unit: str, *, blank: str = NOT_APPLICABLE) -> str:
    """An ellipse azimuth: D:M:S to whole seconds for dms files, else degrees to 2 decimals."""
    if value_deg is None:
        return blank
    return format_dms(value_deg, 0) if angle_unit == "dms" else _fixed(value_deg, 2)


def fmt_percent(value: float | None) -> str:
    """A probability as a percentage (0.95 → "95%")."""
    return NOT_APPLICABLE if value is None else f"{value * 100:g}%"


def length_label(unit: str) -> str:
    """How a length unit is written in headings."""
    return LENGTH_LABELS.get(unit, unit)


def angle_label(unit: str) -> str:
    """How angle values are written in headings (decimal degrees for gon files, as in the JSON)."""
    return ANGLE_LABELS.get(unit, unit)


# --------------------------------------------------------------------------------------
# rows


@dataclass(frozen=True, slots=True)
class Verdict:
    """The global test in words a surveyor reads at a glance; ``state`` drives the banner."""

    state: str  # "pass", "warn", "fail" or "none"
    headline: str
    notes: tuple[str, ...]
    flagged: int
    exceeded: int
    #: used observations with a redundancy number below 0.001: no test can see a blunder in them
    unchecked: int = 0

    @property
    def detail(self) -> str:
        """The notes as one paragraph."""
        return " ".join(self.notes)


@dataclass(frozen=True, slots=True)
class PointRow:
    """One point, every figure formatted."""

    name: str
    east: str
    north: str
    height: str
    sd_east: str
    sd_north: str
    sd_height: str
    role: str
    semi_major: str
    semi_minor: str
    azimuth: str
    in_use: bool
    note: str = ""


@dataclass(frozen=True, slots=True)
class ObservationRow:
    """One observation, every figure formatted; ``w_raw`` only serves client-side sorting."""

    line: int
    kind: str
    stations: str
    marks: tuple[str, ...]
    separator: str
    observed: str
    adjusted: str
    residual: str
    sd: str
    redundancy: str
    w: str
    mdb: str
    flagged: bool
    ignored: bool
    uncontrolled: bool
    status: str
    angular: bool
    w_raw: float | None
    residual_raw: float | None
    redundancy_raw: float | None
    note: str
    booked: str = NOT_APPLICABLE
    reduction: str = NOT_APPLICABLE
    #: −v/r formatted like the residual: the blunder that alone would explain it
    estimated_bias: str = NOT_APPLICABLE
    #: lines whose w-test is the same test as this one's (|ρ| ≥ 0.99)
    inseparable: tuple[int, ...] = ()

    @property
    def inseparable_text(self) -> str:
        """'same test as lines 7, 9' or ''."""
        if not self.inseparable:
            return ""
        lines = ", ".join(str(line) for line in self.inseparable[:8])
        more = f" and {len(self.inseparable) - 8} more" if len(self.inseparable) > 8 else ""
        return f"same test as line{'s' if len(self.inseparable) > 1 else ''} {lines}{more}"


@dataclass(frozen=True, slots=True)
class MisclosureRow:
    """One leveling loop or run, or a traverse, formatted (the last four for traverses only)."""

    kind: str
    route: str
    marks: tuple[str, ...]
    misclosure: str
    length: str
    allowed: str
    exceeds: bool
    status: str
    angular: str = NOT_APPLICABLE
    angular_allowed: str = NOT_APPLICABLE
    ratio: str = NOT_APPLICABLE
    ratio_allowed: str = NOT_APPLICABLE
    stations: str = NOT_APPLICABLE


def verdict_state(
    *, converged: bool, passed: bool | None, flagged: int = 0, exceeded: int = 0, unchecked: int = 0
) -> str:
    """The one rule for a verdict's state: "pass", "warn", "fail" or "none" (``passed`` None:
    not tested).  The results banner, the review, the comparison and the project list use it."""
    if not converged:
        return "fail"
    if passed is None:
        return "none"
    if passed:
        return "warn" if flagged or exceeded or unchecked else "pass"
    return "fail"


def verdict(result: AdjustmentResult) -> Verdict:
    """The summary sentence of the global test, with the counts of flags and exceeded loops."""
    s = result.summary
    flagged = [o.line for o in result.observations if o.flagged]
    exceeded = sum(1 for m in result.misclosures if m.exceeds)
    test = s.global_test
    notes: list[str] = []
    if test is not None:
        notes.append(
            f"Global test (χ², α = {test.alpha:g}): vᵀPv = {fmt_ratio(test.statistic)}, "
            f"accepted between {fmt_ratio(test.lower)} and {fmt_ratio(test.upper)} "
            f"for {s.redundancy} degrees of freedom."
        )
    if flagged:
        labels = _flagged_line_labels(result)
        lines = ", ".join(labels[:12]) + (" …" if len(labels) > 12 else "")
        noun = "observation" if len(flagged) == 1 else "observations"
        notes.append(
            f"{len(flagged)} {noun} flagged by the w-test (|w| > {fmt_w(s.critical_w)}): "
            f"line{'s' if len(labels) > 1 else ''} {lines}."
        )
    notes += _inseparable_notes(result)
    if exceeded:
        noun = "misclosure exceeds" if exceeded == 1 else "misclosures exceed"
        notes.append(f"{exceeded} {noun} the allowance.")
    unchecked = unchecked_observations(result)
    if unchecked:
        notes.append(unchecked_note(result, unchecked))
    detail = tuple(notes)
    state = verdict_state(
        converged=s.converged,
        passed=None if test is None else test.passed,
        flagged=len(flagged),
        exceeded=exceeded,
        unchecked=len(unchecked),
    )
    if not s.converged:
        return Verdict(
            state,
            "Not converged: the iterations did not settle — do not use these results",
            detail,
            len(flagged),
            exceeded,
            len(unchecked),
        )
    if test is None:
        return Verdict(
            state,
            "Not tested: there are no redundant observations, so a blunder cannot be detected",
            detail,
            len(flagged),
            exceeded,
            len(unchecked),
        )
    if test.passed:
        headline = "Passes: the residuals agree with the a priori standard deviations"
        if unchecked:
            headline = (
                f"Passes, but {_count(len(unchecked))} can no longer be checked: a blunder "
                f"in {'it' if len(unchecked) == 1 else 'them'} would go unseen"
            )
        if flagged:
            headline += " — but check the flagged observations"
        return Verdict(state, headline, detail, len(flagged), exceeded, len(unchecked))
    if test.statistic > test.upper:
        headline = "Fails: residuals too large — look for blunders"
    else:
        headline = (
            "Fails: residuals smaller than expected — the a priori standard deviations "
            "may be too pessimistic"
        )
    return Verdict(state, headline, detail, len(flagged), exceeded, len(unchecked))


def _flagged_line_labels(result: AdjustmentResult) -> list[str]:
    """Each line with a flag once; a baseline names its flagged components: "48 (dx, dy)"."""
    components: dict[int, list[str]] = {}
    for o in result.observations:
        if o.flagged:
            components.setdefault(o.line, [])
            if o.component is not None:
                components[o.line].append(o.component)
    return [
        f"{line} ({', '.join(parts)})" if parts else str(line) for line, parts in components.items()
    ]


def _inseparable_notes(result: AdjustmentResult) -> list[str]:
    """One note per group of flagged observations whose w-tests are the same test."""
    groups: dict[tuple[int, ...], None] = {}
    for o in result.observations:
        if o.flagged and o.inseparable:
            groups.setdefault(tuple(sorted({o.line, *o.inseparable})), None)
    notes = []
    for group in list(groups)[:5]:
        shown = (
            ", ".join(map(str, group[:-1])) + f" and {group[-1]}"
            if len(group) <= 12
            else (", ".join(map(str, group[:12])) + f" and {len(group) - 12} more")
        )
        notes.append(
            f"Lines {shown} are tested by the same check: the data cannot tell which of "
            "them is wrong (re-observe them, or check the field notes)."
        )
    return notes


def unchecked_observations(result: AdjustmentResult) -> list[ObservationResult]:
    """Used observations that no test can check (redundancy number below 0.001, w null)."""
    return [
        o for o in result.observations if not o.ignored and o.redundancy is not None and o.w is None
    ]


def _count(n: int) -> str:
    return f"{n} observation" if n == 1 else f"{n} observations"


def unchecked_note(result: AdjustmentResult, unchecked: list[ObservationResult]) -> str:
    """Names the unchecked observations (and the left-out ones that made them so)."""
    shown = ", ".join(f"line {o.line} ({o.kind} {stations(o)})" for o in unchecked[:12])
    if len(unchecked) > 12:
        shown += f" and {len(unchecked) - 12} more"
    left_out = [o.line for o in result.observations if o.ignored]
    cause = ""
    if left_out:
        lines = ", ".join(str(line) for line in left_out[:12]) + (
            " …" if len(left_out) > 12 else ""
        )
        cause = f"With line{'s' if len(left_out) > 1 else ''} {lines} left out,"
    verb = "is" if len(unchecked) == 1 else "are"
    return (
        f"{cause}{' t' if cause else 'T'}he following {verb} no longer checked by any other "
        "observation (redundancy number below 0.001): a blunder in "
        f"{'it' if len(unchecked) == 1 else 'them'} "
        f"would go unseen — {shown}."
    )


def rows(result: AdjustmentResult) -> list[tuple[str, str, str]]:
    """The summary as (label, value, unit) rows."""
    s = result.summary
    test = s.global_test
    out = [
        ("Network", DIMENSION_LABELS.get(s.dimension, str(s.dimension)), ""),
        ("Points", str(s.points), ""),
        ("Observations", str(s.observations), ""),
        ("Used in the adjustment", str(s.used_observations), ""),
        ("Unknowns", str(s.unknowns), ""),
        ("Redundancy (degrees of freedom)", str(s.redundancy), ""),
        ("Iterations", f"{s.iterations} ({'converged' if s.converged else 'NOT converged'})", ""),
        ("Variance factor σ̂₀²", fmt_ratio(s.variance_factor, 3), ""),
        ("Precisions scaled by", precision_short(result), ""),
    ]
    if test is not None:
        out += [
            ("Global test statistic vᵀPv", fmt_ratio(test.statistic), ""),
            ("Acceptance region", f"{fmt_ratio(test.lower)} to {fmt_ratio(test.upper)}", ""),
            ("Global test", "passed" if test.passed else "failed", ""),
        ]
    return out


def settings_rows(result: AdjustmentResult) -> list[tuple[str, str, str]]:
    """The test settings in force, as far as the result records them."""
    s = result.summary
    out: list[tuple[str, str, str]] = []
    out.append(("Significance of the global test α", f"{s.alpha:g}", ""))
    out.append(("Significance of each observation's test α₀", f"{s.snooping:g}", ""))
    out.append(("Critical value of the w-test", f"|w| > {fmt_w(s.critical_w)}", ""))
    out.append(("Power for the minimal detectable bias β₀", fmt_percent(s.power), ""))
    out.append(("Non-centrality for the MDB λ₀", fmt_ratio(s.lambda0), ""))
    if result.summary.dimension != 1:
        out.append(("Confidence of ellipses", fmt_percent(s.confidence), ""))
        out.append(("Ellipse scale factor", fmt_ratio(s.ellipse_factor), ""))
    return out


def units_rows(result: AdjustmentResult) -> list[tuple[str, str, str]]:
    """The units in which the report's figures are given."""
    unit = length_label(result.length_unit)
    out = [("Lengths", unit, "")]
    if any(o.angular for o in result.observations):
        out.append(("Angles", angle_label(result.angle_unit), ""))
        out.append(("Angular residuals, sd and MDB", "arc-seconds (″)", ""))
    return out


def datum_rows(result: AdjustmentResult) -> list[tuple[str, str, str]]:
    """Which points carry the datum: held fixed, or weighted control."""
    fixed = [p for p in result.points if p.fixed]
    weighted = [p for p in result.points if p.weighted]
    out = [(p.name, "held fixed", COMPONENT_LABELS.get(p.fixed, p.fixed)) for p in fixed]
    out += [
        (p.name, "weighted control", COMPONENT_LABELS.get(p.weighted, p.weighted)) for p in weighted
    ]
    return out


def _role(point: PointResult) -> str:
    parts = []
    if point.fixed:
        parts.append(f"fixed {COMPONENT_LABELS.get(point.fixed, point.fixed)}")
    if point.weighted:
        parts.append(f"weighted {COMPONENT_LABELS.get(point.weighted, point.weighted)}")
    if not point.in_use:
        parts.append("not observed")
    return ", ".join(parts) if parts else "adjusted"


def point_rows(result: AdjustmentResult, window: slice = slice(None)) -> list[PointRow]:
    """Adjusted points in file order; ``window`` picks the rows of one page."""
    unit = result.length_unit
    out = []
    for p in result.points[window]:
        e = p.ellipse
        out.append(
            PointRow(
                name=p.name,
                east=fmt_length(p.east, unit),
                north=fmt_length(p.north, unit),
                height=fmt_length(p.height, unit),
                sd_east=fmt_length(p.sd_east, unit),
                sd_north=fmt_length(p.sd_north, unit),
                sd_height=fmt_length(p.sd_height, unit),
                role=_role(p),
                semi_major=fmt_length(e.semi_major if e else None, unit),
                semi_minor=fmt_length(e.semi_minor if e else None, unit),
                azimuth=fmt_azimuth(e.azimuth if e else None, result.angle_unit),
                in_use=p.in_use,
                note=p.note,
            )
        )
    return out


def stations(o: ObservationResult) -> str:
    """The marks of an observation: FROM → TO, or BACK – AT – FORE for an angle."""
    if o.kind == "angle" and o.at is not None:
        return f"{o.from_point} – {o.at} – {o.to}"
    return f"{o.from_point} → {o.to}"


def _marks(o: ObservationResult) -> tuple[str, ...]:
    if o.kind == "angle" and o.at is not None:
        return (o.from_point, o.at, o.to)
    return (o.from_point, o.to)


def _status(o: ObservationResult, uncontrolled: bool) -> str:
    if o.flagged:
        return "flagged"
    if o.ignored:
        return "ignored"
    if uncontrolled:
        return "uncontrolled"
    return ""


def observation_rows(result: AdjustmentResult, window: slice = slice(None)) -> list[ObservationRow]:
    """Observations in file order, each with its residual and test figures formatted.

    ``window`` picks the rows of one page before any is formatted."""
    return observation_rows_of(result, result.observations[window])


def observation_rows_of(
    result: AdjustmentResult, observations: Iterable[ObservationResult]
) -> list[ObservationRow]:
    """``observations`` (some of the result's, in the order given) formatted as table rows."""
    unit, angle_unit = result.length_unit, result.angle_unit
    out = []
    for o in observations:
        if o.angular:
            value = fmt_angle(o.observed, angle_unit)
            booked = fmt_booked_angle(o.booked, angle_unit)
            adjusted = fmt_angle(o.adjusted, angle_unit)
            residual, sd, mdb = fmt_arcsec(o.residual), fmt_arcsec(o.sd), fmt_arcsec(o.mdb)
            bias = fmt_arcsec(o.estimated_bias)
        else:
            value = fmt_length(o.observed, unit)
            booked = fmt_length(o.booked, unit)
            adjusted = fmt_length(o.adjusted, unit)
            residual = fmt_length(o.residual, unit)
            sd, mdb = fmt_length(o.sd, unit), fmt_length(o.mdb, unit)
            bias = fmt_length(o.estimated_bias, unit)
        uncontrolled = not o.ignored and o.redundancy is not None and o.w is None
        out.append(
            ObservationRow(
                line=o.line,
                kind=o.kind if o.component is None else f"{o.kind} {o.component}",
                stations=stations(o),
                marks=_marks(o),
                separator=" – " if o.kind == "angle" and o.at is not None else " → ",
                observed=value,
                adjusted=adjusted,
                residual=residual,
                sd=sd,
                redundancy=fmt_ratio(o.redundancy),
                w=fmt_w(o.w),
                mdb=mdb,
                flagged=o.flagged,
                ignored=o.ignored,
                uncontrolled=uncontrolled,
                status=_status(o, uncontrolled),
                angular=o.angular,
                w_raw=o.w,
                residual_raw=o.residual,
                redundancy_raw=o.redundancy,
                note=o.note,
                booked=booked,
                reduction=reduction_text(o),
                estimated_bias=bias,
                inseparable=o.inseparable,
            )
        )
    return out


def misclosure_rows(result: AdjustmentResult) -> list[MisclosureRow]:
    """Loops, runs and traverses with their misclosure against the allowance."""
    unit = result.length_unit
    out = []
    for m in result.misclosures:
        if m.allowed is None and m.angular_allowed is None:
            status = "no allowance set"
        else:
            status = "exceeds" if m.exceeds else "within"
        out.append(
            MisclosureRow(
                kind=m.kind,
                route=" → ".join(m.points),
                marks=tuple(m.points),
                misclosure=fmt_length(m.misclosure, unit),
                length=fmt_route_length(m.length),
                allowed=fmt_length(m.allowed, unit),
                exceeds=m.exceeds,
                status=status,
                angular=fmt_closure_angle(m.angular_misclosure, result.angle_unit),
                angular_allowed=fmt_closure_angle(m.angular_allowed, result.angle_unit),
                ratio=fmt_precision_ratio(m.ratio, floor=True),
                ratio_allowed=fmt_precision_ratio(m.ratio_allowed),
                stations=NOT_APPLICABLE if m.angle_stations is None else str(m.angle_stations),
            )
        )
    return out


def leveling_rows(result: AdjustmentResult) -> list[MisclosureRow]:
    """The loops and runs of ``misclosure_rows``."""
    return [m for m in misclosure_rows(result) if m.kind != "traverse"]


def traverse_rows(result: AdjustmentResult) -> list[MisclosureRow]:
    """The traverses of ``misclosure_rows``."""
    return [m for m in misclosure_rows(result) if m.kind == "traverse"]


def fmt_closure_angle(arcsec: float | None, angle_unit: str) -> str:
    """An angular closure: arc-seconds to 0.1″, or mgon to 0.1 for gon field books."""
    if arcsec is None:
        return NOT_APPLICABLE
    if angle_unit == "gon":
        return _fixed(arcsec / 3.24, 1) + " mgon"  # 1 mgon = 3.24″
    return _fixed(arcsec, 1) + ARCSEC


def fmt_precision_ratio(n: float | None, *, floor: bool = False) -> str:
    """``1 : 12,345``; an achieved ratio is rounded down so it is never overstated."""
    if n is None:
        return NOT_APPLICABLE
    whole = math.floor(n) if floor else round(n)
    return f"1 : {whole:,}"


@dataclass(frozen=True, slots=True)
class RelativeRow:
    """One pair of joined points: its relative confidence ellipse against the allowance."""

    from_point: str
    to_point: str
    distance: str
    sd_distance: str
    semi_major: str
    semi_minor: str
    azimuth: str
    allowed: str
    passed: bool | None
    status: str
    origin: str = "joined"  # "joined" (by an observation) or "requested" (a relative line)


def relative_rows(result: AdjustmentResult) -> list[RelativeRow]:
    """Relative precision per pair; ``status`` is "meets", "fails", "held points" or
    "no allowance set"."""
    unit = result.length_unit
    out = []
    for r in result.relative:
        if r.held:
            status = "held points, not checked"
        elif r.passed is None:
            status = "no allowance set"
        else:
            status = "meets" if r.passed else "fails"
        out.append(
            RelativeRow(
                from_point=r.from_point,
                to_point=r.to_point,
                distance=fmt_length(r.distance, unit),
                sd_distance=fmt_length(r.sd_distance, unit),
                semi_major=fmt_length(r.semi_major, unit),
                semi_minor=fmt_length(r.semi_minor, unit),
                azimuth=fmt_azimuth(r.azimuth, result.angle_unit),
                allowed=fmt_length(r.allowed, unit),
                passed=r.passed,
                status=status,
                origin="requested" if r.requested else "joined",
            )
        )
    return out


@dataclass(frozen=True, slots=True)
class RelativeHeightRow:
    """A requested pair in a height network: the sd of its height difference."""

    from_point: str
    to_point: str
    height_difference: str
    sd: str
    half_width: str
    held: bool


def relative_height_rows(result: AdjustmentResult) -> list[RelativeHeightRow]:
    """The ``relative A B`` pairs of a height network, formatted."""
    unit = result.length_unit
    return [
        RelativeHeightRow(
            from_point=h.from_point,
            to_point=h.to_point,
            height_difference=fmt_length(h.height_difference, unit),
            sd=fmt_length(h.sd, unit),
            half_width=fmt_length(h.half_width, unit),
            held=h.held,
        )
        for h in result.relative_heights
    ]


@dataclass(frozen=True, slots=True)
class StandardCheck:
    """One family of accuracy-standard checks, summarised for the top of a report."""

    name: str
    total: int
    passed: int
    failed: int
    unchecked: int
    allowance: str
    state: str  # "pass", "fail" or "none" (no allowance set)
    words: str

    @property
    def symbol(self) -> str:
        """✓, ✕ or – beside the words, so the verdict never rests on colour alone."""
        return {"pass": "✓", "fail": "✕"}.get(self.state, "–")


def _allowance_source(
    presets: Sequence[Preset], kind: str, statement: str, any_allowed: bool
) -> str:
    for preset in presets:
        if preset.kind == kind:
            return f"{preset.label} (preset): {preset.source}"
    if any_allowed:
        return f"the field book's own “tolerance {statement}=” statement"
    return (
        f"none: the field book sets no “tolerance {statement}=” and no preset was chosen, "
        "so nothing was checked"
    )


def _check(
    name: str, noun: str, nouns: str, outcomes: list[bool | None], allowance: str
) -> StandardCheck:
    total = len(outcomes)
    passed = sum(1 for o in outcomes if o is True)
    failed = sum(1 for o in outcomes if o is False)
    unchecked = total - passed - failed
    counted = nouns if total != 1 else noun
    if passed + failed == 0:
        state, words = "none", f"Not checked: no allowance for the {total} {counted}"
    elif failed:
        verb = "exceed" if failed != 1 else "exceeds"
        state, words = "fail", f"Fail: {failed} of {passed + failed} {counted} {verb} the allowance"
    else:
        every = "all " if passed > 1 else ""
        state, words = (
            "pass",
            f"Pass: {every}{passed} {nouns if passed != 1 else noun} within the allowance",
        )
    if unchecked and passed + failed:
        words += f" ({unchecked} without an allowance)"
    return StandardCheck(
        name=name,
        total=total,
        passed=passed,
        failed=failed,
        unchecked=unchecked,
        allowance=allowance,
        state=state,
        words=words,
    )


def pairs_checked(relative: Sequence[RelativeResult]) -> str:
    """Which pairs a relative-precision figure covers, e.g. "12 joined pairs and 3 requested pairs".

    Requested pairs (``relative A B`` lines) are counted as requested even when
    an observation also joins them; pairs of two held points are left out.
    """
    live = [r for r in relative if not r.held]
    requested = sum(1 for r in live if r.requested)
    joined = len(live) - requested
    parts = [
        f"{n} {word} pair{'s' if n != 1 else ''}"
        for n, word in ((joined, "joined"), (requested, "requested"))
        if n
    ]
    return " and ".join(parts) or "no pairs"


def _relative_check(check: StandardCheck, relative: Sequence[RelativeResult]) -> StandardCheck:
    """Say which pairs were checked: only joined and requested pairs ever are.

    A plain "all pairs" would claim adjacent corners that no observation joins;
    the words name the two families and that every other pair went unchecked.
    """
    held = sum(1 for r in relative if r.held)
    which = pairs_checked(relative)
    if check.state == "none":
        words = f"Not checked: no allowance for the {which}"
    elif check.state == "fail":
        verb = "exceed" if check.failed != 1 else "exceeds"
        total = check.passed + check.failed
        words = (
            f"Fail: {check.failed} of {total} pair{'s' if total != 1 else ''} {verb} "
            f"the allowance ({which} checked)"
        )
    else:
        words = (
            f"Pass: {which} within the allowance; pairs neither joined by an observation "
            "nor requested with “relative A B” were not checked"
        )
    if held:
        words += f"; {held} pair{'s' if held != 1 else ''} of held points not checked"
    elif check.unchecked and check.state != "none":
        words += f" ({check.unchecked} without an allowance)"
    return replace(check, words=words)


def standards_summary(
    result: AdjustmentResult, presets: Sequence[Preset] = ()
) -> list[StandardCheck]:
    """Pass and fail counts per accuracy standard that applies to the network."""
    out = []
    if result.relative:
        outcomes = [r.passed for r in result.relative]
        allowance = _allowance_source(
            presets, "relative", "relative", any(r.allowed is not None for r in result.relative)
        )
        check = _check(
            f"Relative positional precision at {fmt_percent(result.relative[0].confidence)}",
            "pair of joined points",
            "pairs of joined points",
            outcomes,
            allowance,
        )
        out.append(_relative_check(check, result.relative))
    leveling = [m for m in result.misclosures if m.kind != "traverse"]
    if leveling:
        # the contract records exceeds; an allowance of None means the loop was not checked
        outcomes = [None if m.allowed is None else not m.exceeds for m in leveling]
        allowance = _allowance_source(
            presets, "misclosure", "misclosure", any(m.allowed is not None for m in leveling)
        )
        out.append(
            _check("Leveling misclosures", "loop or run", "loops and runs", outcomes, allowance)
        )
    traverses = [m for m in result.misclosures if m.kind == "traverse"]
    if traverses:
        outcomes = [
            None if m.allowed is None and m.angular_allowed is None else not m.exceeds
            for m in traverses
        ]
        allowance = (
            "the field book's own “tolerance angular= ratio=” statement"
            if any(o is not None for o in outcomes)
            else "none: the field book sets no “tolerance angular=” or “ratio=”"
        )
        out.append(_check("Traverse closures", "traverse", "traverses", outcomes, allowance))
    return out


KIND_LABELS = {
    "level": "Height differences",
    "distance": "Distances",
    "angle": "Angles",
    "direction": "Directions",
    "azimuth": "Azimuths",
    "slope": "Slope distances",
    "zenith": "Zenith angles",
}


def a_priori_rows(result: AdjustmentResult) -> list[tuple[str, str, str]]:
    """(kind, count, range of the a priori sd used) for the observations used, by kind.

    The result records the standard deviation actually used for each
    observation (centering and distance-dependent parts included), not the
    ``defaults`` statement, so the report shows their range per kind.
    """
    groups: dict[str, list[ObservationResult]] = {}
    for o in result.observations:
        if not o.ignored:
            groups.setdefault(o.kind, []).append(o)
    unit = length_label(result.length_unit)
    out = []
    for kind, items in groups.items():
        low, high = min(o.sd for o in items), max(o.sd for o in items)
        if items[0].angular:
            lo_text, hi_text, suffix = fmt_arcsec(low), fmt_arcsec(high), ARCSEC
        else:
            lo_text = fmt_length(low, result.length_unit)
            hi_text = fmt_length(high, result.length_unit)
            suffix = f" {unit}"
        value = f"{lo_text}{suffix}" if lo_text == hi_text else f"{lo_text} to {hi_text}{suffix}"
        out.append((KIND_LABELS.get(kind, kind), str(len(items)), value))
    return out


#: How each ``tests precision=`` choice reads in a report.
PRECISION_WORDS = {
    "posterior": "the a posteriori variance factor",
    "prior": "the a priori variance factor",
    "larger": "the larger of the a priori and a posteriori variance factors",
}


def _sd_times(variance: float) -> str:
    return fmt_ratio(math.sqrt(variance), 3)


def precision_short(result: AdjustmentResult) -> str:
    """The scaling in force for the summary table, e.g. "a posteriori σ̂₀² = 1.840 (sd × 1.356)"."""
    s = result.summary
    used = s.precision_factor if s.precision_factor is not None else 1.0
    which = "a posteriori σ̂₀²" if s.precision_estimated else "a priori σ₀²"
    chosen = "larger: " if s.precision_method == "larger" else ""
    return f"{chosen}{which} = {fmt_ratio(used, 3)} (sd × {_sd_times(used)})"


def precision_note(result: AdjustmentResult) -> str:
    """The ``tests precision=`` choice and its effect on every standard deviation and ellipse."""
    s = result.summary
    method, posterior = s.precision_method, s.variance_factor
    setting = f"tests precision={method}" + (" (the default)" if method == "posterior" else "")
    if posterior is None:
        return (
            f"Precisions use the a priori variance factor 1 (standard deviations × 1.000, as "
            "propagated from the a priori standard deviations): with no redundancy the a "
            f"posteriori variance factor cannot be estimated, whatever {setting} asks for."
        )
    effect = f"standard deviations × {_sd_times(posterior)}"
    if method == "posterior":
        return (
            f"Precisions scaled by the a posteriori variance factor {fmt_ratio(posterior, 3)} "
            f"({effect}); set by {setting}."
        )
    if method == "prior":
        return (
            "Precisions scaled by the a priori variance factor 1 (standard deviations × 1.000, "
            "as propagated from the a priori standard deviations); the a posteriori variance "
            f"factor {fmt_ratio(posterior, 3)} would have given {effect}. Set by {setting}."
        )
    if s.precision_estimated:
        return (
            f"Precisions scaled by {PRECISION_WORDS['larger']} (1 and "
            f"{fmt_ratio(posterior, 3)}): the a posteriori one, {effect}; set by {setting}."
        )
    return (
        f"Precisions scaled by {PRECISION_WORDS['larger']} (1 and {fmt_ratio(posterior, 3)}): "
        "the a priori one, standard deviations × 1.000; the a posteriori factor alone would "
        f"have given {effect}, smaller than the a priori model supports. Set by {setting}."
    )


def ellipse_convention(result: AdjustmentResult) -> str:
    """The 95 % (or other) factor of the ellipses in words, with its value for this network."""
    s = result.summary
    p = fmt_percent(s.confidence)
    if s.redundancy > 0 and not s.precision_estimated:
        return (
            f"Confidence ellipses ({p}) are the standard ellipse of Qxx (a priori σ₀² = 1, "
            f"as tests precision={s.precision_method} chose) multiplied by "
            f"k = √χ²({p}; 2) = {s.ellipse_factor:.4f}: the variance is taken as known, "
            "not estimated from the observations, so the χ² quantile applies rather than F."
        )
    if s.redundancy > 0:
        return (
            f"Confidence ellipses ({p}) are the standard ellipse of σ̂₀²·Qxx multiplied by "
            f"k = √(2·F({p}; 2, r)) = {s.ellipse_factor:.4f} for r = {s.redundancy} degrees "
            "of freedom. The F quantile allows for σ₀ being estimated from the same "
            f"observations; k tends to √χ²({p}; 2) as r grows (2.4477 at 95%)."
        )
    return (
        f"Confidence ellipses ({p}) are the standard ellipse of Qxx (a priori σ₀ = 1, "
        f"no redundancy) multiplied by k = √χ²({p}; 2) = {s.ellipse_factor:.4f}."
    )


@dataclass(frozen=True, slots=True)
class Columns:
    """Which point columns apply, and the unit headings of the observation columns."""

    positions: bool
    heights: bool
    ellipses: bool
    values_unit: str
    small_unit: str
    mixed: bool


def columns(result: AdjustmentResult) -> Columns:
    """Decide which columns to show; a mixed table labels angular cells with ″."""
    unit = length_label(result.length_unit)
    angular = any(o.angular for o in result.observations)
    linear = any(not o.angular for o in result.observations)
    mixed = angular and linear
    if mixed:
        values_unit, small_unit = f"{unit} / {angle_label(result.angle_unit)}", f"{unit} / {ARCSEC}"
    elif angular:
        values_unit, small_unit = angle_label(result.angle_unit), ARCSEC
    else:
        values_unit, small_unit = unit, unit
    return Columns(
        positions=any(p.east is not None or p.north is not None for p in result.points),
        heights=any(p.height is not None for p in result.points),
        ellipses=any(p.ellipse is not None for p in result.points),
        values_unit=values_unit,
        small_unit=small_unit,
        mixed=mixed,
    )


#: Size of the inline SVG histogram, in CSS pixels (it scales with the page).
HISTOGRAM_SIZE = (720.0, 250.0)

# Rows per table per page on the results page; the downloads always hold every row.
PAGE_SIZE = 500


@dataclass(frozen=True)
class Page:
    """One page of a long table: ``number`` of ``count`` (both from 1), rows start..stop-1."""

    number: int
    count: int
    total: int
    start: int
    stop: int

    @property
    def window(self) -> slice:
        return slice(self.start, self.stop)

    @property
    def paged(self) -> bool:
        """Whether the table needs a pager at all (small tables show as before)."""
        return self.count > 1

    @property
    def label(self) -> str:
        return f"rows {self.start + 1:,}–{self.stop:,} of {self.total:,}"


def page(total: int, requested: int = 1, size: int = PAGE_SIZE) -> Page:
    """The page ``requested`` of a table of ``total`` rows, clamped to the pages there are."""
    count = max(1, -(-total // size))
    number = min(max(1, requested), count)
    start = (number - 1) * size
    return Page(number, count, total, start, min(total, start + size))


def flagged_lines(result: AdjustmentResult) -> list[int]:
    """Lines of the flagged observations, so a paged table can still list them all (a
    baseline's line once, however many of its components are flagged)."""
    return list(dict.fromkeys(o.line for o in result.observations if o.flagged))


def context(
    result: AdjustmentResult,
    presets: Sequence[Preset] = (),
    obs_page: int | None = None,
    pt_page: int | None = None,
    all_observation_rows: Sequence[ObservationRow] | None = None,
) -> dict[str, object]:
    """Everything the report and the results page lay out; ``presets`` name the allowances chosen.

    ``obs_page`` / ``pt_page`` (results page only) show one page of the observation and
    point tables; without them every row is laid out, as the downloads need.
    ``all_observation_rows``: every observation's row when the caller keeps them already."""
    # imported here: geodetic_tables formats with this module's helpers
    from server.report.geodetic_tables import geodetic_context

    histogram = w_histogram(result)
    obs = page(len(result.observations), obs_page) if obs_page is not None else None
    pts = page(len(result.points), pt_page) if pt_page is not None else None
    return {
        **geodetic_context(result, pts.window if pts else slice(None)),
        "result": result,
        "standards": standards_summary(result, presets),
        "presets": list(presets),
        "relative_rows": relative_rows(result),
        "relative_height_rows": relative_height_rows(result),
        "a_priori_rows": a_priori_rows(result),
        "ellipse_note": ellipse_convention(result) if result.summary.dimension != 1 else "",
        "precision_note": precision_note(result),
        "histogram": histogram,
        "histogram_layout": None
        if histogram is None
        else histogram_layout(histogram, *HISTOGRAM_SIZE),
        "verdict": verdict(result),
        "summary_rows": rows(result),
        "settings_rows": settings_rows(result),
        "units_rows": units_rows(result),
        "datum_rows": datum_rows(result),
        "point_rows": point_rows(result, pts.window if pts else slice(None)),
        "point_page": pts,
        "point_notes": any(p.note for p in result.points),
        "reductions_note": reductions_note(result),
        "observation_rows": observation_rows(result, obs.window if obs else slice(None))
        if all_observation_rows is None
        else list(all_observation_rows[obs.window if obs else slice(None)]),
        "observation_page": obs,
        "flagged_lines": flagged_lines(result) if obs and obs.paged else [],
        "misclosure_rows": misclosure_rows(result),
        "leveling_rows": leveling_rows(result),
        "traverse_rows": traverse_rows(result),
        "columns": columns(result),
        "length_unit": length_label(result.length_unit),
        "variance_factor": fmt_ratio(result.summary.variance_factor, 3),
        "critical_w": fmt_w(result.summary.critical_w),
        "confidence": fmt_percent(result.summary.confidence),
        "arcsec": ARCSEC,
        "version": __version__,
    }
