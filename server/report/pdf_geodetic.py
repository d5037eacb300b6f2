"""The geodetic sections of the PDF report: the model, geodetic coordinates, baseline tests.

Each block is empty for a plane result without a ``crs`` line, so those reports keep their
layout.  The figures are the rows of ``geodetic_tables`` (shared with HTML and text).
"""

from __future__ import annotations

from typing import Any

from reportlab.platypus import CondPageBreak, Flowable, Paragraph

from server.report.pdf_kit import FAIL, Column, Styles, data_table, hex_colour, kv_table


def _heading(text: str, styles: Styles) -> list[Flowable]:
    return [CondPageBreak(90), styles.para(text, styles.h2)]


def model_block(data: dict[str, Any], styles: Styles, width: float) -> list[Flowable]:
    """Model, CRS, refraction, geoid source and the deflection assumption."""
    rows = data["model_rows"]
    if not rows:
        return []
    return [
        *_heading("Geodetic model", styles),
        kv_table(styles, [(label, value) for label, value, _ in rows], width, 0.3),
    ]


def geodetic_points_block(data: dict[str, Any], styles: Styles, width: float) -> list[Flowable]:
    """Latitude, longitude, h, N, H, scale factor and convergence of every point."""
    rows = data["geodetic_point_rows"]
    if not rows:
        return []
    unit = data["length_unit"]
    columns = [
        Column("Point", None, weight=1.2),
        Column("Latitude (°)", 62, True),
        Column("Longitude (°)", 62, True),
        Column(f"h ({unit})", 52, True),
        Column(f"Geoid N ({unit})", 44, True),
        Column(f"H ({unit})", 52, True),
        Column("Scale factor", 52, True),
        Column("Convergence", 52, True),
    ]
    body = [
        [
            Paragraph(styles.text(g.name), styles.cell_bold),
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
    return [
        *_heading("Geodetic coordinates", styles),
        data_table(styles, columns, body, width),
        styles.para(data["geodetic_note"], styles.note),
    ]


def baseline_tests_block(data: dict[str, Any], styles: Styles, width: float) -> list[Flowable]:
    """vᵀQv⁺v of each baseline against the χ²(3) quantile."""
    rows = data["baseline_test_rows"]
    if not rows:
        return []
    columns = [
        Column("Line", 26, True),
        Column("Baseline", None, widest=300),
        Column("vᵀQv⁺v", 50, True),
        Column("Critical χ²(3)", 56, True),
        Column("Test", 50),
    ]
    body, states = [], []
    for t in rows:
        if t.flagged:
            test: Any = styles.markup(
                f'<font color="{hex_colour(FAIL)}"><b>{styles.text("⚑ flagged")}</b></font>',
                styles.cell,
            )
        else:
            test = Paragraph("ok", styles.cell_muted)
        body.append(
            [
                str(t.line),
                Paragraph(styles.text(f"{t.from_point} → {t.to_point}"), styles.cell),
                t.statistic,
                t.critical,
                test,
            ]
        )
        states.append("bad" if t.flagged else "")
    return [
        *_heading("Baseline tests", styles),
        data_table(styles, columns, body, width, row_states=states),
        styles.para(data["baseline_test_note"], styles.note),
    ]
