"""A design's figures as formatted rows, built once for the text, HTML and PDF reports and
the design page (formats, never computes)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from server.design.plan import WEAK_REDUNDANCY
from server.report.tables import (
    NOT_APPLICABLE,
    PointRow,
    RelativeRow,
    fmt_arcsec,
    fmt_length,
    fmt_ratio,
    length_label,
    point_rows,
    relative_rows,
    stations,
)
from server.results.result import AdjustmentResult
from server.results.types import UNCONTROLLED, ObservationResult


@dataclass(frozen=True, slots=True)
class PlannedRow:
    """One planned observation: its σ, r, MDB and external reliability, formatted."""

    line: int
    kind: str
    stations: str
    sd: str
    redundancy: str
    mdb: str
    external: str
    used: bool
    weak: bool
    uncontrolled: bool
    inseparable: str


def planned_rows(result: AdjustmentResult) -> list[PlannedRow]:
    """Every observation of the book in file order; switched-off ones with blanks."""
    unit = result.length_unit
    return [_planned_row(o, unit) for o in result.observations]


def _planned_row(o: ObservationResult, unit: str) -> PlannedRow:
    def small(value: float | None) -> str:
        return fmt_arcsec(value) if o.angular else fmt_length(value, unit)

    used = o.redundancy is not None
    r = o.redundancy
    lines = ", ".join(str(line) for line in o.inseparable[:8])
    return PlannedRow(
        line=o.line,
        kind=o.kind + (f" {o.component}" if o.component else ""),
        stations=stations(o),
        sd=small(o.sd),
        redundancy=fmt_ratio(r, 3),
        mdb=small(o.mdb),
        external=fmt_length(o.external_reliability, unit),
        used=used and not o.ignored,
        weak=r is not None and UNCONTROLLED <= r < WEAK_REDUNDANCY,
        uncontrolled=r is not None and r < UNCONTROLLED,
        inseparable=f"same test as {lines}" if lines else "",
    )


def summary_rows(result: AdjustmentResult) -> list[tuple[str, str]]:
    """The design's counts and settings as label–value pairs."""
    s = result.summary
    weak = sum(1 for row in planned_rows(result) if row.weak)
    return [
        ("Planned observations (used)", f"{s.used_observations} of {s.observations}"),
        ("Unknowns", str(s.unknowns)),
        ("Redundancy n − u", str(s.redundancy)),
        ("Weakly controlled (r < 0.3)", str(weak)),
        ("Variance of unit weight", "1 (a priori; no values in a design)"),
        ("Ellipse confidence / factor", f"{s.confidence:.0%} / {s.ellipse_factor:.4f}"),
        ("MDB: test level / power", f"{s.snooping:g} / {s.power:g} (λ₀ = {s.lambda0:.2f})"),
        ("Length unit", length_label(result.length_unit)),
    ]


def design_context(result: AdjustmentResult) -> dict[str, Any]:
    """Everything a design report shows, formatted."""
    points: list[PointRow] = point_rows(result)
    relative: list[RelativeRow] = relative_rows(result)
    return {
        "result": result,
        "summary_rows": summary_rows(result),
        "points": points,
        "relative": relative,
        "planned": planned_rows(result),
        "unit": length_label(result.length_unit),
        "weak_threshold": WEAK_REDUNDANCY,
        "blank": NOT_APPLICABLE,
    }


def design_figures(result: AdjustmentResult) -> dict[str, Any]:
    """The design page's figures as formatted text, for the page's script to put in place:
    points by name, observations by line, the summary, relative rows and warnings."""
    data = design_context(result)
    return {
        "summary": [[label, value] for label, value in data["summary_rows"]],
        "points": {
            p.name: [p.sd_east, p.sd_north, p.sd_height, p.semi_major, p.semi_minor, p.azimuth]
            for p in data["points"]
        },
        "observations": {
            str(o.line): {
                "sd": o.sd,
                "redundancy": o.redundancy,
                "mdb": o.mdb,
                "external": o.external,
                "note": planned_note(o),
            }
            for o in data["planned"]
        },
        "relative": [
            [r.from_point, r.to_point, r.semi_major, r.semi_minor, r.allowed, r.status]
            for r in data["relative"]
        ],
        "warnings": list(result.warnings),
    }


def planned_note(o: PlannedRow) -> str:
    """ "switched off", "uncontrolled", "weak" and the inseparable lines, as the tables say."""
    if not o.used:
        return "switched off"
    words = ["uncontrolled"] if o.uncontrolled else ["weak"] if o.weak else []
    return "; ".join(words + ([o.inseparable] if o.inseparable else []))
