"""A design as a PDF report: the same page furniture as the adjustment report (the caution
and "page N of M" on every page), the design's tables."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from reportlab.platypus import Flowable, Spacer

from server.report import html as html_report
from server.report.design_tables import design_context
from server.report.pdf import _heading, _numbered_canvas, report_pages
from server.report.pdf_kit import (
    Column,
    Styles,
    data_table,
    kv_table,
    load_fonts,
    make_styles,
)
from server.results.result import AdjustmentResult


def design_pdf(
    result: AdjustmentResult, *, generated: datetime | None = None, page_size: str = "letter"
) -> bytes:
    """The design report as PDF bytes."""
    fonts = load_fonts(None)
    styles = make_styles(fonts)
    data = design_context(result)
    page = report_pages(
        result, fonts, styles, page_size, generated, "Network design", kind="network design"
    )
    buffer, doc, width, title = page.buffer, page.doc, page.width, page.title
    story: list[Flowable] = [styles.para(f"Network design — {title}", styles.h2)]
    story += [
        styles.para(
            "Figures of the planned observations from their a priori standard "
            "deviations at the approximate coordinates (variance of unit weight "
            "1); no value was measured or used.",
            styles.small,
        ),
        Spacer(1, 4),
    ]
    story.append(kv_table(styles, data["summary_rows"], width * 0.6))
    story += _tables(data, styles, width)
    if result.warnings:
        story += _heading("Warnings", styles)
        story += [
            styles.markup(f"<b>{i}.</b> {styles.text(w)}", styles.small)
            for i, w in enumerate(html_report.report_warnings(result), start=1)
        ]
    doc.build(story, canvasmaker=_numbered_canvas(fonts))
    return buffer.getvalue()


def _tables(data: dict[str, Any], styles: Styles, width: float) -> list[Flowable]:
    unit = data["unit"]
    out = _heading(f"Point precision ({unit}, a priori)", styles)
    out.append(
        data_table(
            styles,
            [Column("Point", weight=2)]
            + [
                Column(h, numeric=True)
                for h in ("sd E", "sd N", "sd H", "Semi-major", "Semi-minor", "Azimuth")
            ],
            [
                [p.name, p.sd_east, p.sd_north, p.sd_height, p.semi_major, p.semi_minor, p.azimuth]
                for p in data["points"]
            ],
            width,
        )
    )
    if data["relative"]:
        out += _heading(f"Relative confidence ellipses ({unit})", styles)
        out.append(
            data_table(
                styles,
                [Column("From"), Column("To")]
                + [Column(h, numeric=True) for h in ("Semi-major", "Semi-minor", "Allowed")]
                + [Column("Check")],
                [
                    [r.from_point, r.to_point, r.semi_major, r.semi_minor, r.allowed, r.status]
                    for r in data["relative"]
                ],
                width,
            )
        )
    out += _heading(
        "Planned observations (angles in arc-seconds; ext. reliability: largest "
        f"point shift from an MDB, {unit})",
        styles,
    )
    planned = data["planned"]
    out.append(
        data_table(
            styles,
            [Column("Line", numeric=True), Column("Kind"), Column("Stations", weight=2)]
            + [Column(h, numeric=True) for h in ("sd", "r", "MDB", "Ext. rel.")]
            + [Column("Note", weight=2)],
            [
                [
                    str(o.line),
                    o.kind,
                    o.stations,
                    o.sd,
                    o.redundancy,
                    o.mdb,
                    o.external,
                    "switched off"
                    if not o.used
                    else "uncontrolled"
                    if o.uncontrolled
                    else "weak"
                    if o.weak
                    else "",
                ]
                for o in planned
            ],
            width,
            row_states=[
                "bad" if o.weak or o.uncontrolled else "muted" if not o.used else ""
                for o in planned
            ],
        )
    )
    return out
