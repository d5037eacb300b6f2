"""The terminal summary of a result: fixed-width text tables."""

from __future__ import annotations

from collections.abc import Iterable

from server import __version__
from server.report.geodetic_tables import (
    baseline_test_note,
    baseline_test_rows,
    geodetic_note,
    geodetic_point_rows,
    model_rows,
)
from server.report.origin import ApprovalNote, ImportedFrom
from server.report.tables import (
    ARCSEC,
    columns,
    fmt_percent,
    fmt_ratio,
    fmt_w,
    length_label,
    leveling_rows,
    observation_rows,
    point_rows,
    precision_note,
    reductions_note,
    relative_height_rows,
    standards_summary,
    traverse_rows,
    verdict,
)
from server.results.result import AdjustmentResult

# --------------------------------------------------------------------------------------
# plain text


def _table(header: Iterable[str], body: list[list[str]], right: set[int]) -> list[str]:
    head = list(header)
    widths = [len(h) for h in head]
    for row in body:
        widths = [max(w, len(c)) for w, c in zip(widths, row, strict=True)]

    def line(cells: list[str]) -> str:
        parts = [
            c.rjust(w) if i in right else c.ljust(w)
            for i, (c, w) in enumerate(zip(cells, widths, strict=True))
        ]
        return "  ".join(parts).rstrip()

    return [line(head), line(["-" * w for w in widths])] + [line(r) for r in body]


def report_text(
    result: AdjustmentResult,
    imported_from: ImportedFrom | None = None,
    approval: ApprovalNote | None = None,
) -> str:
    """A compact plain-text summary for the terminal (naming the imported file, if any, and
    the approval of the run, if it was approved for issue)."""
    v = verdict(result)
    s = result.summary
    unit = length_label(result.length_unit)
    title = result.title or result.source or "field book"
    out = [f"Stationfit {__version__} — {title}"]
    out.append(f"SHA-256 of the field book: {result.text_sha256}")
    if imported_from is not None:
        out.append(
            f"Imported from {imported_from.kind} {imported_from.filename}, "
            f"SHA-256 {imported_from.sha256}"
        )
    if approval is not None:
        out.append(approval.sentence)
    out.append("")
    head, _, rest = v.headline.partition(": ")
    out.append(f"{head.upper()}: {rest}")
    out += list(v.notes)
    out.append(
        f"{s.points} points, {s.used_observations} of {s.observations} observations used, "
        f"{s.unknowns} unknowns, redundancy {s.redundancy}, "
        f"variance factor {fmt_ratio(s.variance_factor, 3)}"
    )
    out.append(precision_note(result))
    out += _model_lines(result)
    out += [f"{c.symbol} {c.name}: {c.words}." for c in standards_summary(result)]
    if reduced := reductions_note(result):
        out.append(reduced)

    out += ["", "Points"] + _points_table(result)
    out += _geodetic_points(result)
    heights = relative_height_rows(result)
    if heights:
        rows_h = [
            [
                h.from_point,
                h.to_point,
                h.height_difference,
                h.sd,
                h.half_width + (" (held)" if h.held else ""),
            ]
            for h in heights
        ]
        out += ["", "Relative precision of height differences (relative lines)"] + _table(
            ["from", "to", f"ΔH {unit}", "sd ΔH", f"± {fmt_percent(result.summary.confidence)}"],
            rows_h,
            {2, 3, 4},
        )

    exceeded = [m for m in leveling_rows(result) if m.exceeds]
    if exceeded:
        out += ["", "Misclosures over the allowance"]
        out += _table(
            ["kind", "route", f"misclosure {unit}", "allowed"],
            [[m.kind, m.route, m.misclosure, m.allowed] for m in exceeded],
            {2, 3},
        )
    traverses = traverse_rows(result)
    if traverses:
        out += ["", "Traverse closures before adjustment"]
        out += _table(
            [
                "route",
                "n",
                "angular",
                "allowed",
                f"linear {unit}",
                "precision",
                "required",
                "check",
            ],
            [
                [
                    m.route,
                    m.stations,
                    m.angular,
                    m.angular_allowed,
                    m.misclosure,
                    m.ratio,
                    m.ratio_allowed,
                    m.status,
                ]
                for m in traverses
            ],
            {1, 2, 3, 4},
        )

    # the largest |w| first: that is the observation to suspect first
    flagged = sorted(
        (o for o in observation_rows(result) if o.flagged), key=lambda o: -abs(o.w_raw or 0.0)
    )
    out += ["", f"Flagged observations (|w| > {fmt_w(s.critical_w)}, largest first)"]
    if flagged:
        out += _table(
            [
                "line",
                "kind",
                "marks",
                "booked",
                "reduction",
                "used",
                "residual",
                "w",
                "est. bias",
                "MDB",
                "same test as",
            ],
            [
                [
                    str(o.line),
                    o.kind,
                    o.stations,
                    o.booked,
                    o.reduction,
                    o.observed,
                    o.residual + (ARCSEC if o.angular else f" {unit}"),
                    o.w,
                    o.estimated_bias + (ARCSEC if o.angular else f" {unit}"),
                    o.mdb + (ARCSEC if o.angular else f" {unit}"),
                    ", ".join(map(str, o.inseparable)) or "-",
                ]
                for o in flagged
            ],
            {0, 3, 4, 5, 6, 7, 8, 9},
        )
    else:
        out.append("none")

    out += _baseline_tests(result)

    if result.warnings:
        out += ["", "Warnings"]
        out += [f"{i}. {w}" for i, w in enumerate(result.warnings, start=1)]
    out += ["", f"CAUTION: {result.caution}", ""]
    return "\n".join(out)


def _model_lines(result: AdjustmentResult) -> list[str]:
    """Model, CRS, refraction, geoid and the vertical (results with a CRS only)."""
    return [f"{label}: {value}" for label, value, _ in model_rows(result)]


def _geodetic_points(result: AdjustmentResult) -> list[str]:
    """Latitude, longitude, heights and projection factors (results with a CRS only)."""
    rows = geodetic_point_rows(result)
    if not rows:
        return []
    unit = length_label(result.length_unit)
    body = [
        [
            g.name,
            g.latitude,
            g.longitude,
            g.ellipsoidal_height,
            g.geoid,
            g.height,
            g.scale_factor,
            g.convergence,
        ]
        for g in rows
    ]
    header = [
        "point",
        "latitude °",
        "longitude °",
        f"h {unit}",
        f"N {unit}",
        f"H {unit}",
        "scale factor",
        "convergence",
    ]
    return (
        ["", "Geodetic coordinates"]
        + _table(header, body, set(range(1, 8)))
        + [geodetic_note(result)]
    )


def _baseline_tests(result: AdjustmentResult) -> list[str]:
    """Every baseline's vᵀQv⁺v against χ²(3) (geodetic results with baselines only)."""
    rows = baseline_test_rows(result)
    if not rows:
        return []
    body = [
        [str(t.line), f"{t.from_point} → {t.to_point}", t.statistic, t.critical, t.status]
        for t in rows
    ]
    table = _table(["line", "baseline", "vTQv+v", "critical", "test"], body, {0, 2, 3})
    return ["", "Baseline tests"] + table + [baseline_test_note(result)]


def _points_table(result: AdjustmentResult) -> list[str]:
    """The points with the columns that apply to this network."""
    cols = columns(result)
    unit = length_label(result.length_unit)
    header = ["point"]
    right = set()
    if cols.positions:
        header += [f"east {unit}", f"north {unit}", "sd E", "sd N"]
    if cols.heights:
        header += [f"height {unit}", "sd H"]
    if cols.ellipses:
        header += ["ellipse a", "b", "az"]
    header.append("datum")
    right = set(range(1, len(header) - 1))
    notes = any(p.note for p in result.points)
    if notes:
        header.append("note")
    body = []
    for p in point_rows(result):
        row = [p.name]
        if cols.positions:
            row += [p.east, p.north, p.sd_east, p.sd_north]
        if cols.heights:
            row += [p.height, p.sd_height]
        if cols.ellipses:
            row += [p.semi_major, p.semi_minor, p.azimuth]
        row.append(p.role)
        if notes:
            row.append(p.note)
        body.append(row)
    return _table(header, body, right)
