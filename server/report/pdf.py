"""The adjustment report as a PDF, drawn on the server with reportlab.

The PDF lays out the same rows as the HTML report (``report.context``): it
formats nothing of its own and computes no figure.  What is done here is
page layout:

* **Every page** carries a header (software, title, the field book's
  SHA-256) and a footer with the professional caution and "Page N of M".
  The page count is known only at the end, so the canvas keeps each page
  and writes the numbers when the document is saved.
* **Tables** are platypus ``LongTable``s whose header row repeats on every
  page they run onto; rows never split across pages.
* **Drawings** (the network plot, the histogram of w) come from
  ``pdf_drawings``; fonts, escaping of user text and table styles from
  ``pdf_kit``.
"""

from __future__ import annotations

import io
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from reportlab.lib.pagesizes import A4, letter
from reportlab.pdfbase import pdfmetrics
from reportlab.pdfgen.canvas import Canvas
from reportlab.platypus import (
    BaseDocTemplate,
    CondPageBreak,
    Flowable,
    Frame,
    KeepTogether,
    PageTemplate,
    Paragraph,
    Spacer,
    Table,
    TableStyle,
)

from server import __version__
from server.report import html as html_report
from server.report import tables as report
from server.report.origin import ApprovalNote, ImportedFrom
from server.report.pdf_drawings import histogram_drawing, network_drawing, network_legend
from server.report.pdf_geodetic import baseline_tests_block, geodetic_points_block, model_block
from server.report.pdf_kit import (
    FAIL,
    INK,
    MUTED,
    RULE,
    STATE_COLOURS,
    Column,
    Fonts,
    Styles,
    data_table,
    hex_colour,
    kv_table,
    load_fonts,
    make_styles,
    plain,
    state_box,
)
from server.report.plot import network_plot_data
from server.results.result import AdjustmentResult
from server.review.standards import Preset

PAGE_SIZES = {"letter": letter, "a4": A4}

MARGIN_X = 42.0
HEADER_HEIGHT = 50.0
FOOTER_HEIGHT = 68.0


# --------------------------------------------------------------------------------------
# page furniture


@dataclass(frozen=True, slots=True)
class Furniture:
    """What every page repeats: header texts, the caution, the hash."""

    title: str
    caution: str
    sha256: str
    generated: str
    kind: str = "adjustment report"


def _header_footer(furniture: Furniture, styles: Styles) -> Callable[[Canvas, Any], None]:
    fonts = styles.fonts

    def draw(canvas: Canvas, doc: Any) -> None:
        width, height = doc.pagesize
        right = width - MARGIN_X
        canvas.saveState()
        # header
        top = height - 26
        canvas.setFillColor(MUTED)
        canvas.setFont(fonts.regular, 7)
        left_text = plain(
            f"Stationfit {__version__} · {furniture.kind} · {furniture.generated}", fonts
        )
        canvas.drawString(MARGIN_X, top, left_text)
        room = right - MARGIN_X - pdfmetrics.stringWidth(left_text, fonts.regular, 7) - 18
        canvas.setFont(fonts.bold, 7.4)
        canvas.setFillColor(INK)
        canvas.drawRightString(
            right, top, _fit(plain(furniture.title, fonts), fonts.bold, 7.4, room)
        )
        canvas.setStrokeColor(RULE)
        canvas.setLineWidth(0.6)
        canvas.line(MARGIN_X, top - 6, right, top - 6)
        # footer: the caution on every page, then the hash and (at save) the page number
        canvas.line(MARGIN_X, FOOTER_HEIGHT - 6, right, FOOTER_HEIGHT - 6)
        caution = Paragraph(f"<b>Caution.</b> {styles.text(furniture.caution)}", styles.footer)
        _, h = caution.wrap(right - MARGIN_X, FOOTER_HEIGHT)
        caution.drawOn(canvas, MARGIN_X, FOOTER_HEIGHT - 10 - h)
        canvas.setFont(fonts.mono, 6.2)
        canvas.setFillColor(MUTED)
        canvas.drawString(MARGIN_X, 22, f"Field book SHA-256 {furniture.sha256}")
        canvas.restoreState()

    return draw


def _fit(text: str, font: str, size: float, room: float) -> str:
    """The text cut with an ellipsis so that it fits in ``room`` points."""
    if pdfmetrics.stringWidth(text, font, size) <= room:
        return text
    while text and pdfmetrics.stringWidth(text + "...", font, size) > room:
        text = text[:-1]
    return text.rstrip() + "..."


def _numbered_canvas(fonts: Fonts) -> type[Canvas]:
    """A canvas that holds its pages until ``save`` and then writes "Page N of M" on each."""

    class NumberedCanvas(Canvas):  # type: ignore[misc]  # reportlab ships no type hints
        def __init__(self, *args: Any, **kwargs: Any) -> None:
            super().__init__(*args, **kwargs)
            self._held_pages: list[dict[str, Any]] = []

        def showPage(self) -> None:  # noqa: N802 (reportlab's name, overridden)
            self._held_pages.append(dict(self.__dict__))
            self._startPage()

        def save(self) -> None:
            total = len(self._held_pages)
            for state in self._held_pages:
                self.__dict__.update(state)
                self.setFont(fonts.bold, 7.6)
                self.setFillColor(INK)
                self.drawRightString(
                    self._pagesize[0] - MARGIN_X, 22, f"Page {self.getPageNumber()} of {total}"
                )
                super().showPage()
            super().save()

    return NumberedCanvas


# --------------------------------------------------------------------------------------
# sections


def _heading(text: str, styles: Styles) -> list[Flowable]:
    return [CondPageBreak(90), styles.para(text, styles.h2)]


def _title_block(
    result: AdjustmentResult,
    data: dict[str, Any],
    styles: Styles,
    width: float,
    generated: str,
    imported_from: ImportedFrom | None = None,
) -> list[Flowable]:
    title = result.title or html_report.source_name(result.source) or "Untitled field book"
    facts = [
        ("Generated", generated),
        ("Software", f"Stationfit {__version__}"),
        ("Field book", html_report.source_name(result.source) or "—"),
    ]
    if imported_from is not None:
        facts.append(("Imported from", html_report.source_name(imported_from.filename)))
    facts += [
        ("Network", report.DIMENSION_LABELS.get(result.summary.dimension, "")),
    ]
    facts += [(label, value) for label, value, _ in data["units_rows"]]
    half = (len(facts) + 1) // 2
    left, right = facts[:half], facts[half:]
    columns = Table(
        [
            [
                kv_table(styles, left, width / 2 - 8, 0.34),
                kv_table(styles, right, width / 2 - 8, 0.44),
            ]
        ],
        colWidths=[width / 2, width / 2],
        hAlign="LEFT",
    )
    columns.setStyle(
        TableStyle(
            [
                ("VALIGN", (0, 0), (-1, -1), "TOP"),
                ("LEFTPADDING", (0, 0), (-1, -1), 0),
                ("RIGHTPADDING", (0, 0), (-1, -1), 0),
            ]
        )
    )
    return [
        styles.para("LEAST-SQUARES ADJUSTMENT REPORT", styles.kicker),
        styles.para(title, styles.title),
        columns,
        Spacer(1, 4),
        styles.markup(
            f'<font color="{hex_colour(MUTED)}">SHA-256 of the field book</font>  '
            f'<font name="{styles.fonts.mono}">{styles.text(result.text_sha256)}</font>',
            styles.small,
        ),
        *_imported_hash(imported_from, styles),
        Spacer(1, 8),
    ]


def _imported_hash(imported_from: ImportedFrom | None, styles: Styles) -> list[Flowable]:
    """The imported file's SHA-256 under the field book's, so both files can be verified."""
    if imported_from is None:
        return []
    label = f"SHA-256 of the {imported_from.kind} file"
    return [
        styles.markup(
            f'<font color="{hex_colour(MUTED)}">{styles.text(label)}</font>  '
            f'<font name="{styles.fonts.mono}">'
            f"{styles.text(imported_from.sha256)}</font>",
            styles.small,
        )
    ]


def _verdict_block(data: dict[str, Any], styles: Styles, width: float) -> list[Flowable]:
    v = data["verdict"]
    symbol = {"pass": "✓", "fail": "✕"}.get(v.state, "!")
    lines: list[Flowable] = [
        styles.markup(f"<b>Global test. {styles.text(v.headline)}.</b>", styles.body)
    ]
    lines += [styles.para(note, styles.small) for note in v.notes]
    return [state_box(styles, v.state, symbol, lines, width), Spacer(1, 6)]


def _standards_block(data: dict[str, Any], styles: Styles, width: float) -> list[Flowable]:
    out: list[Flowable] = []
    for check in data["standards"]:
        lines = [
            styles.markup(f"<b>{styles.text(check.name)}. {styles.text(check.words)}.</b>"),
            styles.para(f"Allowance: {check.allowance}.", styles.small),
        ]
        out += [state_box(styles, check.state, check.symbol, lines, width), Spacer(1, 4)]
    return out


def _statistics_block(
    result: AdjustmentResult, data: dict[str, Any], styles: Styles, width: float
) -> list[Flowable]:
    half = width / 2 - 8
    left: list[Flowable] = [
        styles.para("Statistics", styles.h2),
        kv_table(styles, [(a, b) for a, b, _ in data["summary_rows"]], half),
    ]
    right: list[Flowable] = [
        styles.para("Test settings", styles.h2),
        kv_table(styles, [(a, b) for a, b, _ in data["settings_rows"]], half),
    ]
    left += [styles.para("Datum", styles.h2)]
    if data["datum_rows"]:
        left.append(
            kv_table(
                styles,
                [(name, f"{how} — {what}") for name, how, what in data["datum_rows"]],
                half,
                0.4,
            )
        )
    else:
        left.append(styles.para("No point is held fixed or weighted.", styles.small))
    if data["a_priori_rows"]:
        right += [
            styles.para("A priori standard deviations", styles.h2),
            kv_table(
                styles,
                [(f"{kind} ({count})", value) for kind, count, value in data["a_priori_rows"]],
                half,
                0.5,
            ),
            styles.para(
                "As used for each observation, centering and distance-dependent "
                "parts included; σ₀ = 1 a priori.",
                styles.note,
            ),
        ]
    table = Table([[left, right]], colWidths=[width / 2, width / 2], hAlign="LEFT")
    table.setStyle(
        TableStyle(
            [
                ("VALIGN", (0, 0), (-1, -1), "TOP"),
                ("LEFTPADDING", (0, 0), (-1, -1), 0),
                ("RIGHTPADDING", (0, 0), (-1, -1), 0),
            ]
        )
    )
    out: list[Flowable] = [table, styles.para(data["precision_note"], styles.note)]
    if data["ellipse_note"]:
        out.append(styles.para(data["ellipse_note"], styles.note))
    return out


def _points_block(
    result: AdjustmentResult, data: dict[str, Any], styles: Styles, width: float
) -> list[Flowable]:
    cols = data["columns"]
    unit = data["length_unit"]
    columns = [Column("Point", None, weight=1.2)]
    if cols.positions:
        columns += [
            Column(f"East ({unit})", 62, True),
            Column(f"North ({unit})", 62, True),
            Column("sd E", 34, True),
            Column("sd N", 34, True),
        ]
    if cols.heights:
        columns += [Column(f"Height ({unit})", 54, True), Column("sd H", 34, True)]
    if cols.ellipses:
        columns += [
            Column(f"Ellipse a ({data['confidence']})", 44, True),
            Column("b", 34, True),
            Column("Azimuth a", 44, True),
        ]
    columns.append(Column("Datum / note" if data["point_notes"] else "Datum", None))
    rows, states = [], []
    for p in data["point_rows"]:
        row: list[Any] = [Paragraph(styles.text(p.name), styles.cell_bold)]
        if cols.positions:
            row += [p.east, p.north, p.sd_east, p.sd_north]
        if cols.heights:
            row += [p.height, p.sd_height]
        if cols.ellipses:
            row += [p.semi_major, p.semi_minor, p.azimuth]
        role = styles.text(p.role)
        if p.note:  # the monument's description under its role
            role += f'<br/><font color="{hex_colour(MUTED)}">{styles.text(p.note)}</font>'
        row.append(Paragraph(role, styles.cell))
        rows.append(row)
        states.append("" if p.in_use else "muted")
    scaled = "a posteriori" if result.summary.precision_estimated else "a priori (σ₀² = 1)"
    note = (
        f"Coordinates and standard deviations in {unit}; standard deviations are {scaled}"
        + (
            (
                "; ellipse azimuths of the major axis from true north, axes along local east "
                "and north"
                if result.geodetic
                else "; ellipse azimuths of the major axis from grid north"
            )
            if cols.ellipses
            else ""
        )
        + "."
    )
    return [
        *_heading("Adjusted points", styles),
        data_table(styles, columns, rows, width, row_states=states),
        styles.para(note, styles.note),
    ]


def _check_cell(styles: Styles, passed: bool | None, good: str, bad: str, other: str) -> Paragraph:
    if passed is False:
        return styles.markup(
            f'<font color="{hex_colour(FAIL)}"><b>{styles.text("✕ " + bad)}</b></font>', styles.cell
        )
    if passed:
        return styles.markup(
            f'<font color="{hex_colour(STATE_COLOURS["pass"][0])}">'
            f"{styles.text('✓ ' + good)}</font>",
            styles.cell,
        )
    return Paragraph(styles.text(other), styles.cell_muted)


def _relative_block(data: dict[str, Any], styles: Styles, width: float) -> list[Flowable]:
    if not data["relative_rows"]:
        return []
    unit = data["length_unit"]
    # without an allowance the last two columns would only repeat "no allowance set"
    checked = any(r.passed is not None for r in data["relative_rows"])
    columns = [
        Column("From", None),
        Column("To", None),
        Column("Pair", 44),
        Column(f"Distance ({unit})", 54, True),
        Column("sd distance", 40, True),
        Column(f"Ellipse a ({data['confidence']})", 46, True),
        Column("b", 36, True),
        Column("Azimuth a", 44, True),
    ]
    if checked:
        columns += [Column(f"Allowed ({unit})", 46, True), Column("Check", 58)]
    rows, states = [], []
    for r in data["relative_rows"]:
        row = [
            Paragraph(styles.text(r.from_point), styles.cell_bold),
            Paragraph(styles.text(r.to_point), styles.cell),
            r.origin,
            r.distance,
            r.sd_distance,
            r.semi_major,
            r.semi_minor,
            r.azimuth,
        ]
        if checked:
            row += [r.allowed, _check_cell(styles, r.passed, "meets", "fails", r.status)]
        rows.append(row)
        states.append("bad" if r.passed is False else "")
    note = (
        "Semi-major axis a of the relative confidence ellipse between the two points, from "
        "the full covariance of their coordinate difference; a pair meets the allowance "
        "when a ≤ allowed."
        if checked
        else "Semi-major axis a of the relative confidence ellipse between the two points, from "
        "the full covariance of their coordinate difference. No allowance was set (no "
        "“tolerance relative=” in the field book and no preset), so no pair was checked."
    )
    note += (
        " “Joined” pairs share an observation; “requested” pairs were named in a "
        "“relative A B” line. No other pair is checked."
    )
    return [
        *_heading("Relative precision between point pairs", styles),
        data_table(styles, columns, rows, width, row_states=states),
        styles.para(note, styles.note),
    ]


def _traverse_block(data: dict[str, Any], styles: Styles, width: float) -> list[Flowable]:
    if not data["traverse_rows"]:
        return []
    unit = data["length_unit"]
    columns = [
        Column("Route", None, widest=300),
        Column("n", 20, True),
        Column("Angular", 44, True),
        Column("Allowed", 44, True),
        Column(f"Linear ({unit})", 50, True),
        Column(f"Length ({unit})", 54, True),
        Column("Precision", 56, True),
        Column("Required", 56, True),
        Column("Check", 50),
    ]
    rows, states = [], []
    for m in data["traverse_rows"]:
        passed = None if m.status == "no allowance set" else not m.exceeds
        rows.append(
            [
                Paragraph(styles.text(m.route), styles.cell),
                m.stations,
                m.angular,
                m.angular_allowed,
                m.misclosure,
                m.length,
                m.ratio,
                m.ratio_allowed,
                _check_cell(styles, passed, "within", "exceeds", m.status),
            ]
        )
        states.append("bad" if m.exceeds else "")
    note = (
        "From the booked angles and the distances after any scale factor, before adjustment. "
        "The angular misclosure is spread equally over the n angle stations before latitudes "
        "and departures are summed; the angular allowance is K·√n, the precision the traverse "
        "length over the linear misclosure, rounded down."
    )
    return [
        *_heading("Traverse closures before adjustment", styles),
        data_table(styles, columns, rows, width, row_states=states),
        styles.para(note, styles.note),
    ]


def _misclosure_block(data: dict[str, Any], styles: Styles, width: float) -> list[Flowable]:
    if not data["leveling_rows"]:
        return []
    unit = data["length_unit"]
    columns = [
        Column("Kind", 34),
        Column("Route", None, widest=400),
        Column(f"Misclosure ({unit})", 56, True),
        Column(f"Length ({unit})", 54, True),
        Column(f"Allowed ({unit})", 50, True),
        Column("Check", 56),
    ]
    rows, states = [], []
    for m in data["leveling_rows"]:
        passed = None if m.status == "no allowance set" else not m.exceeds
        rows.append(
            [
                m.kind,
                Paragraph(styles.text(m.route), styles.cell),
                m.misclosure,
                m.length,
                m.allowed,
                _check_cell(styles, passed, "within", "exceeds", m.status),
            ]
        )
        states.append("bad" if m.exceeds else "")
    note = (
        "From the observed height differences before adjustment; a loop repeats its first "
        "mark. The allowance adds its parts linearly (c + k·√L with L in km)."
    )
    return [
        *_heading("Leveling misclosures before adjustment", styles),
        data_table(styles, columns, rows, width, row_states=states),
        styles.para(note, styles.note),
    ]


def _plot_block(result: AdjustmentResult, styles: Styles, width: float) -> list[Flowable]:
    data = network_plot_data(result)
    if data is None:
        return []
    parts: list[Flowable] = [
        styles.para("Network", styles.h2),
        network_drawing(data, width, styles.fonts),
        Spacer(1, 4),
        network_legend(data, styles, width),
    ]
    note = "Grid north up."
    if data["has_ellipses"]:
        note += (
            f" Ellipses are drawn {data['exaggeration_label']} their true size; "
            "the ellipse scale bar reads in true lengths."
        )
    if data["not_drawn"]:
        note += " Not drawn (no horizontal position): " + ", ".join(data["not_drawn"]) + "."
    parts.append(styles.para(note, styles.note))
    return [KeepTogether(parts)]


def _histogram_block(data: dict[str, Any], styles: Styles, width: float) -> list[Flowable]:
    h = data["histogram"]
    if h is None:
        return []
    apart = (
        f"; the bars set apart at the ends count the w beyond the axis, the largest |w| "
        f"being {h.largest:.2f}"
        if h.below or h.above
        else ""
    )
    caption = (
        f"Bars: the {h.tested} tested observations by their w (bins {h.bin_width:g} wide"
        f"{apart}). "
        "Curve: how many a bin should hold if every w were standard normal (no blunder, "
        "a priori standard deviations right). Dashed: the critical values "
        f"±{report.fmt_w(h.critical)}; "
        + (f"⚑ {h.beyond} beyond them." if h.beyond else "none beyond them.")
    )
    parts = [
        styles.para("Standardized residuals", styles.h2),
        histogram_drawing(h, width, 190, styles.fonts),
        styles.para(caption, styles.note),
    ]
    return [KeepTogether(parts)]


def _observation_block(data: dict[str, Any], styles: Styles, width: float) -> list[Flowable]:
    cols = data["columns"]
    columns = [
        Column("Line", 22, True),
        Column("Kind", 38),
        Column("Marks", None, widest=400),
        Column(f"Booked\n({cols.values_unit})", 58, True),
        Column("Used", 58, True),
        Column(f"Residual\n({cols.small_unit})", 44, True),
        Column(f"sd\n({cols.small_unit})", 36, True),
        Column("r", 24, True),
        Column("w", 30, True),
        Column(f"Est. bias\n({cols.small_unit})", 40, True),
        Column(f"MDB\n({cols.small_unit})", 40, True),
        Column("Test", 46),
    ]
    rows, states = [], []
    arcsec = data["arcsec"]
    for o in data["observation_rows"]:
        sfx = arcsec if (cols.mixed and o.angular) else ""
        marks = styles.text(o.stations)
        if o.note:
            marks += f'<br/><font color="{hex_colour(MUTED)}">{styles.text(o.note)}</font>'
        if o.flagged:
            test = styles.markup(
                f'<font color="{hex_colour(FAIL)}"><b>{styles.text("⚑ flagged")}</b></font>',
                styles.cell,
            )
        elif o.ignored:
            test = Paragraph("ignored", styles.cell_muted)
        elif o.uncontrolled:
            test = Paragraph("uncontrolled", styles.cell)
        else:
            test = Paragraph("ok", styles.cell_muted)
        # the reduction under the booked value, where there is one (the page is too narrow for
        # a column of its own beside the test figures)
        booked: Any = o.booked
        if o.reduction != report.NOT_APPLICABLE:
            booked = Paragraph(
                f"{styles.text(o.booked)}<br/>{styles.text(o.reduction)}", styles.cell_right
            )
        if o.inseparable:
            test = [test, Paragraph(styles.text(o.inseparable_text), styles.cell_muted)]
        w_cell: Any = o.w
        if o.flagged:
            w_cell = Paragraph(f"<b>{styles.text(o.w)}</b>", styles.cell_right)
        rows.append(
            [
                str(o.line),
                o.kind,
                Paragraph(marks, styles.cell_muted if o.ignored else styles.cell),
                booked,
                o.observed,
                o.residual + sfx,
                o.sd + sfx,
                o.redundancy,
                w_cell,
                o.estimated_bias + (sfx if o.estimated_bias != report.NOT_APPLICABLE else ""),
                o.mdb + sfx,
                test,
            ]
        )
        states.append("bad" if o.flagged else ("muted" if o.ignored else ""))
    note = (
        "Booked: the value as written in the field book, with the reduction that turned it "
        "into the value used beneath it (× the scale factor for a distance)."
        + (f" {data['reductions_note']}" if data["reductions_note"] else "")
        + " Residual = adjusted − used (the adjusted value is used + residual; the HTML "
        "report and the CSV list it). r: redundancy number. w: standardized residual, "
        f"flagged when |w| > {data['critical_w']}. Est. bias: −v/r, the blunder that alone "
        "would explain the residual. \u201cSame test as\u201d: w-tests correlated at "
        "|ρ| ≥ 0.99, which the data cannot tell apart. MDB: minimal detectable bias."
        + (
            f" Angular figures are marked ″ (arc-seconds); the others are in {data['length_unit']}."
            if cols.mixed
            else ""
        )
    )
    return [
        *_heading("Observations", styles),
        data_table(styles, columns, rows, width, row_states=states),
        styles.para(note, styles.note),
    ]


def _warnings_block(result: AdjustmentResult, styles: Styles) -> list[Flowable]:
    if not result.warnings:
        return []
    out = _heading("Warnings", styles)
    for i, warning in enumerate(html_report.report_warnings(result), start=1):
        out.append(styles.markup(f"<b>{i}.</b> {styles.text(warning)}", styles.small))
        out.append(Spacer(1, 2))
    return out


def _notes_block(
    result: AdjustmentResult, data: dict[str, Any], presets: Sequence[Preset], styles: Styles
) -> list[Flowable]:
    s = result.summary
    notes = [
        (
            "The a priori standard deviation of unit weight σ₀ is 1. The global test compares "
            "vᵀPv with the two-sided χ² bounds for the redundancy at the level α of the test "
            "settings."
        ),
        (
            "w is Baarda's standardized residual v / (σ·√r) with the a priori σ; an observation is "
            f"flagged when |w| exceeds {report.fmt_w(s.critical_w)} "
            f"(two-sided, α₀ = {s.snooping:g}). "
            f"The minimal detectable bias is σ·√(λ₀ / r) with λ₀ = {report.fmt_ratio(s.lambda0)} "
            f"(α₀ = {s.snooping:g}, power {report.fmt_percent(s.power)}). Observations with a "
            "redundancy number below 0.001 are uncontrolled: a blunder in them cannot be detected."
        ),
    ]
    if data["ellipse_note"]:
        notes.append(data["ellipse_note"])
    if result.relative:
        notes.append(
            "Relative precision: the semi-major axis of the relative confidence ellipse "
            "of each pair of points joined by an observation or named in a “relative A B” "
            "line (no other pair is checked), compared with an allowance "
            "of a fixed part plus parts per million of the distance between them, the "
            "parts added."
        )
    for preset in presets:
        status = (
            "constants checked against the published text"
            if preset.verified
            else "constants recalled from memory and not yet checked against the published document"
        )
        notes.append(f"Preset {preset.label}: {preset.source}; {status}.")
    out = _heading("Notes", styles)
    for note in notes:
        out += [styles.para(note, styles.small), Spacer(1, 3)]
    return out


def _review_block(styles: Styles, width: float) -> list[Flowable]:
    rows = [
        [styles.para(label, styles.small), ""]
        for label in ("Reviewed by", "License number and jurisdiction", "Date", "Signature")
    ]
    table = Table(rows, colWidths=[150, width - 150], rowHeights=[20] * len(rows), hAlign="LEFT")
    table.setStyle(
        TableStyle(
            [
                ("LINEBELOW", (1, 0), (1, -1), 0.6, INK),
                ("VALIGN", (0, 0), (-1, -1), "BOTTOM"),
                ("LEFTPADDING", (0, 0), (-1, -1), 0),
            ]
        )
    )
    return [CondPageBreak(130), KeepTogether([styles.para("Review record", styles.h2), table])]


# --------------------------------------------------------------------------------------
# the document


@dataclass(frozen=True)
class ReportPages:
    """A report's document with its page furniture, ready for a story."""

    buffer: io.BytesIO
    doc: BaseDocTemplate
    width: float  # of the text column, points
    title: str
    generated: str


def report_pages(
    result: AdjustmentResult,
    fonts: Fonts,
    styles: Styles,
    page_size: str,
    generated: datetime | None,
    heading: str,
    kind: str = "adjustment report",
) -> ReportPages:
    """The page size, margins, metadata and the header and footer every page repeats (the
    caution and the field book's hash), for the adjustment and the design reports alike."""
    when = html_report.generated_text(generated)
    title = result.title or html_report.source_name(result.source) or "Untitled field book"
    size = PAGE_SIZES[page_size]
    width = size[0] - 2 * MARGIN_X
    buffer = io.BytesIO()
    doc = BaseDocTemplate(
        buffer,
        pagesize=size,
        leftMargin=MARGIN_X,
        rightMargin=MARGIN_X,
        topMargin=HEADER_HEIGHT,
        bottomMargin=FOOTER_HEIGHT,
        title=plain(f"{heading} — {title}", fonts),
        author=f"Stationfit {__version__}",
        subject=f"Field book SHA-256 {result.text_sha256}",
        creator=f"Stationfit {__version__}",
    )
    frame = Frame(
        MARGIN_X,
        FOOTER_HEIGHT,
        width,
        size[1] - HEADER_HEIGHT - FOOTER_HEIGHT,
        leftPadding=0,
        rightPadding=0,
        topPadding=0,
        bottomPadding=0,
        id="body",
    )
    furniture = Furniture(
        title=title, caution=result.caution, sha256=result.text_sha256, generated=when, kind=kind
    )
    doc.addPageTemplates(
        [PageTemplate(id="page", frames=[frame], onPage=_header_footer(furniture, styles))]
    )
    return ReportPages(buffer, doc, width, title, when)


def report_pdf(
    result: AdjustmentResult,
    *,
    generated: datetime | None = None,
    presets: Sequence[Preset] = (),
    page_size: str = "letter",
    font_dir: Path | None = None,
    imported_from: ImportedFrom | None = None,
    approval: ApprovalNote | None = None,
) -> bytes:
    """The adjustment report as PDF bytes.

    Parameters
    ----------
    result
        The adjustment to report.
    generated
        The moment printed as "generated" (now, in UTC, by default).
    presets
        The accuracy-standard presets applied to ``result``, named with their sources.
    page_size
        "letter" (default) or "a4".
    font_dir
        Where to look for the DejaVu fonts (default ``FONT_DIR``); Helvetica without them.
    imported_from
        The survey XML or CSV the field book was imported from, named with its SHA-256.
    approval
        Who approved the run for issue, when, and of which field book (under the title).
    """
    if page_size not in PAGE_SIZES:
        raise ValueError(f"page_size must be one of {', '.join(PAGE_SIZES)}, not {page_size!r}")
    fonts = load_fonts(font_dir)
    styles = make_styles(fonts)
    data = report.context(result, presets)
    page = report_pages(result, fonts, styles, page_size, generated, "Adjustment report")
    buffer, doc, width, when = page.buffer, page.doc, page.width, page.generated
    story: list[Flowable] = []
    story += _title_block(result, data, styles, width, when, imported_from)
    if approval is not None:
        story += [styles.markup(f"<b>{styles.text(approval.sentence)}</b>", styles.small)]
        story += [Spacer(1, 8)]
    story += _verdict_block(data, styles, width)
    story += _standards_block(data, styles, width)
    story += _statistics_block(result, data, styles, width)
    story += model_block(data, styles, width)
    story += _plot_block(result, styles, width)
    story += _points_block(result, data, styles, width)
    story += geodetic_points_block(data, styles, width)
    story += _relative_block(data, styles, width)
    story += _misclosure_block(data, styles, width)
    story += _traverse_block(data, styles, width)
    story += _histogram_block(data, styles, width)
    story += _observation_block(data, styles, width)
    story += baseline_tests_block(data, styles, width)
    story += _warnings_block(result, styles)
    story += _notes_block(result, data, presets, styles)
    story += _review_block(styles, width)
    doc.build(story, canvasmaker=_numbered_canvas(fonts))
    return buffer.getvalue()
