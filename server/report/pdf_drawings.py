"""Vector drawings of the PDF report: the network plot and the histogram of w.

Built with reportlab's graphics from ``plot.network_plot_data`` and
``histogram.layout``, so the PDF needs neither a browser nor a plotting
library.  The network plot follows the results page: one map unit is one
length unit, grid north up, ellipses at the exaggeration the plot chose,
symbols and labels sized in the plot's nominal pixels times ``k``, the
points per nominal pixel.  reportlab's y axis points up, so y is flipped
and an azimuth (clockwise from north) turns a shape by −azimuth.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from reportlab.graphics.shapes import (
    Circle,
    Drawing,
    Ellipse,
    Group,
    Line,
    Polygon,
    PolyLine,
    Rect,
    String,
)
from reportlab.lib import colors
from reportlab.pdfbase import pdfmetrics
from reportlab.platypus import Table, TableStyle

from server.report import histogram
from server.report.pdf_kit import (
    ACCENT,
    FAIL,
    INK,
    MUTED,
    PALE,
    RULE,
    SLATE,
    STRIPE,
    WHITE,
    Fonts,
    Styles,
    plain,
)

# --------------------------------------------------------------------------------------
# network plot


def _faded(colour: colors.Color, alpha: float) -> colors.Color:
    return colors.Color(colour.red, colour.green, colour.blue, alpha=alpha)


def _symbol(kind: str, in_use: bool, x: float, y: float, k: float) -> list[Any]:
    """A point symbol at (x, y), sized in nominal pixels times ``k`` (as on the results page)."""
    if kind == "fixed":
        return [
            Rect(
                x - 6 * k,
                y - 6 * k,
                12 * k,
                12 * k,
                fillColor=INK,
                strokeColor=WHITE,
                strokeWidth=1.2 * k,
            ),
            Circle(x, y, 1.9 * k, fillColor=WHITE, strokeColor=None),
        ]
    if kind == "weighted":
        outer = [x, y + 7.5 * k, x + 7.5 * k, y, x, y - 7.5 * k, x - 7.5 * k, y]
        inner = [x, y + 3 * k, x + 3 * k, y, x, y - 3 * k, x - 3 * k, y]
        return [
            Polygon(outer, fillColor=WHITE, strokeColor=INK, strokeWidth=1.6 * k, strokeLineJoin=1),
            Polygon(inner, fillColor=INK, strokeColor=None),
        ]
    if in_use:
        return [
            Circle(x, y, 4.8 * k, fillColor=WHITE, strokeColor=ACCENT, strokeWidth=2 * k),
            Circle(x, y, 1.3 * k, fillColor=ACCENT, strokeColor=None),
        ]
    return [
        Circle(
            x,
            y,
            4.6 * k,
            fillColor=WHITE,
            strokeColor=MUTED,
            strokeWidth=1.4 * k,
            strokeDashArray=[2.2 * k, 1.8 * k],
        )
    ]


def _flag(x: float, y: float, k: float) -> list[Any]:
    """The flag that marks a line with a flagged observation (a shape, not only a colour)."""
    return [
        Line(x, y, x, y + 19 * k, strokeColor=FAIL, strokeWidth=1.6 * k),
        Polygon(
            [x + 0.8 * k, y + 19 * k, x + 13 * k, y + 15 * k, x + 0.8 * k, y + 11 * k],
            fillColor=FAIL,
            strokeColor=WHITE,
            strokeWidth=0.8 * k,
        ),
        Circle(x, y, 2.6 * k, fillColor=FAIL, strokeColor=WHITE, strokeWidth=1 * k),
    ]


def _ignored_mark(x: float, y: float, k: float) -> list[Any]:
    return [
        Circle(x, y, 5 * k, fillColor=WHITE, strokeColor=MUTED, strokeWidth=1.2 * k),
        Line(
            x - 3.2 * k,
            y - 3.2 * k,
            x + 3.2 * k,
            y + 3.2 * k,
            strokeColor=MUTED,
            strokeWidth=1.2 * k,
        ),
    ]


_LINE_DASHES = {
    "distance": None,
    "sighting": [6, 4],
    "height": [9, 3, 2, 3],
    "ignored": [1.5, 3.5],
    "baseline": [11, 3],
}
#: GNSS baselines in a colour of their own, as in the HTML plot
GNSS = colors.HexColor("#7a4a9c")
_LINE_WIDTHS = {"distance": 1.5, "baseline": 1.7}


def _line_shape(style: str, x1: float, y1: float, x2: float, y2: float, k: float) -> Line:
    dash = _LINE_DASHES.get(style)
    colour = PALE if style == "ignored" else (GNSS if style == "baseline" else SLATE)
    width = _LINE_WIDTHS.get(style, 1.3)
    return Line(
        x1,
        y1,
        x2,
        y2,
        strokeColor=colour,
        strokeWidth=width * k,
        strokeDashArray=None if dash is None else [d * k for d in dash],
    )


def network_drawing(data: dict[str, Any], width: float, fonts: Fonts) -> Drawing:
    """The network plot of ``plot.network_plot_data`` as a reportlab drawing ``width`` wide."""
    nominal = data["nominal"]
    k = width / nominal["width"]  # points per nominal pixel
    height = nominal["height"] * k
    view = data["view"]
    scale = width / view["width"]  # points per length unit

    def at(x: float, y: float) -> tuple[float, float]:
        return (x - view["x"]) * scale, height - (y - view["y"]) * scale

    drawing = Drawing(width, height)
    drawing.add(Rect(0, 0, width, height, fillColor=WHITE, strokeColor=RULE, strokeWidth=0.6))
    for ln in data["lines"]:
        x1, y1 = at(ln["x1"], ln["y1"])
        x2, y2 = at(ln["x2"], ln["y2"])
        if ln["flagged"]:
            drawing.add(
                Line(
                    x1,
                    y1,
                    x2,
                    y2,
                    strokeColor=_faded(FAIL, 0.32),
                    strokeWidth=9 * k,
                    strokeDashArray=[9 * k, 5 * k],
                )
            )
            pattern = _LINE_DASHES.get("baseline") if ln["style"] == "baseline" else (6, 4)
            dash = (
                None if ln["style"] == "distance" or pattern is None else [d * k for d in pattern]
            )
            drawing.add(
                Line(x1, y1, x2, y2, strokeColor=FAIL, strokeWidth=2 * k, strokeDashArray=dash)
            )
        else:
            drawing.add(_line_shape(ln["style"], x1, y1, x2, y2, k))
    for p in data["points"]:
        e = p["ellipse"]
        if e is None:
            continue
        x, y = at(p["x"], p["y"])
        group = Group(
            Ellipse(
                0,
                0,
                e["rx"] * scale,
                e["ry"] * scale,
                fillColor=_faded(ACCENT, 0.09),
                strokeColor=ACCENT,
                strokeWidth=1.3 * k,
            )
        )
        group.translate(x, y)
        group.rotate(-e["azimuth"])  # azimuths turn clockwise; reportlab's angles anticlockwise
        drawing.add(group)
    for ln in data["lines"]:
        if ln["has_ignored"]:
            for shape in _ignored_mark(*at(ln["ix"], ln["iy"]), k):
                drawing.add(shape)
    for ln in data["lines"]:
        if ln["flagged"]:
            for shape in _flag(*at(ln["mx"], ln["my"]), k):
                drawing.add(shape)
    label_size = max(12 * k, 6.4)
    for p in data["points"]:
        x, y = at(p["x"], p["y"])
        for shape in _symbol(p["kind"], p["in_use"], x, y, k):
            drawing.add(shape)
    for p in data["points"]:
        x, y = at(p["x"], p["y"])
        label = p["label"]
        text = plain(p["name"], fonts)
        tx, ty = x + label["dx"] * k, y - label["dy"] * k
        text_width = pdfmetrics.stringWidth(text, fonts.bold, label_size)
        left = {"start": tx, "end": tx - text_width, "middle": tx - text_width / 2}[label["anchor"]]
        drawing.add(
            Rect(
                left - 1,
                ty - 0.28 * label_size,
                text_width + 2,
                label_size * 1.12,
                fillColor=_faded(WHITE, 0.78),
                strokeColor=None,
            )
        )
        drawing.add(
            String(
                tx,
                ty,
                text,
                fontName=fonts.bold,
                fontSize=label_size,
                fillColor=INK,
                textAnchor=label["anchor"],
            )
        )
    _furniture(drawing, data, width, height, k, fonts)
    return drawing


def _furniture(
    drawing: Drawing, data: dict[str, Any], width: float, height: float, k: float, fonts: Fonts
) -> None:
    """North arrow and scale bars, sized in nominal pixels as on the results page."""
    nx, ny = width - 30 * k, height - 12 * k
    drawing.add(
        String(
            nx,
            ny - 11 * k,
            "N",
            fontName=fonts.bold,
            fontSize=13 * k,
            fillColor=INK,
            textAnchor="middle",
        )
    )
    drawing.add(
        Polygon(
            [nx, ny - 15 * k, nx + 6.5 * k, ny - 40 * k, nx, ny - 35 * k],
            fillColor=INK,
            strokeColor=None,
        )
    )
    drawing.add(
        Polygon(
            [nx, ny - 15 * k, nx - 6.5 * k, ny - 40 * k, nx, ny - 35 * k],
            fillColor=WHITE,
            strokeColor=INK,
            strokeWidth=1.1 * k,
        )
    )
    font_size = max(11.5 * k, 6.2)
    x0, y0 = 16 * k, 16 * k
    bar = data["map_bar"]["px"] * k
    by = y0 + 30 * k
    drawing.add(
        Rect(
            x0 - 0.5 * k,
            by - 0.5 * k,
            bar + k,
            7 * k,
            fillColor=WHITE,
            strokeColor=INK,
            strokeWidth=k,
        )
    )
    drawing.add(Rect(x0, by, bar / 2, 6 * k, fillColor=INK, strokeColor=None))
    drawing.add(
        String(
            x0 + bar + 8 * k,
            by,
            plain(data["map_bar"]["label"], fonts),
            fontName=fonts.regular,
            fontSize=font_size,
            fillColor=INK,
        )
    )
    if data["has_ellipses"]:
        ebar = data["ellipse_bar"]["px"] * k
        drawing.add(
            PolyLine(
                [x0, y0 + 7 * k, x0, y0, x0 + ebar, y0, x0 + ebar, y0 + 7 * k],
                strokeColor=ACCENT,
                strokeWidth=1.8 * k,
            )
        )
        label = f"{data['ellipse_bar']['label']} on the ellipses ({data['exaggeration_label']})"
        drawing.add(
            String(
                x0 + ebar + 8 * k,
                y0,
                plain(label, fonts),
                fontName=fonts.regular,
                fontSize=font_size,
                fillColor=ACCENT,
            )
        )


def _legend_line(style: str) -> Callable[[float, float], list[Any]]:
    """The legend symbol of a line style: a short stroke through the symbol's middle."""
    return lambda x, y: [_line_shape(style, 1, y, 25, y, 1.0)]


def _legend_item(
    symbol: Callable[[float, float], list[Any]], words: str, styles: Styles
) -> list[Any]:
    icon = Drawing(26, 14)
    for shape in symbol(13, 7):
        icon.add(shape)
    return [icon, styles.para(words, styles.small)]


def network_legend(data: dict[str, Any], styles: Styles, width: float) -> Table:
    """The plot's key: only the symbols the plot uses."""
    k = 0.8
    present = data["present"]
    items = []
    if present["fixed"]:
        items.append(
            _legend_item(lambda x, y: _symbol("fixed", True, x, y, k), "Held fixed", styles)
        )
    if present["weighted"]:
        items.append(
            _legend_item(
                lambda x, y: _symbol("weighted", True, x, y, k), "Weighted control", styles
            )
        )
    if present["free"]:
        items.append(_legend_item(lambda x, y: _symbol("free", True, x, y, k), "Adjusted", styles))
    if present["unused_point"]:
        items.append(
            _legend_item(lambda x, y: _symbol("free", False, x, y, k), "Not observed", styles)
        )
    if data["has_ellipses"]:

        def ellipse(x: float, y: float) -> list[Any]:
            group = Group(
                Ellipse(
                    0, 0, 4, 6.5, fillColor=_faded(ACCENT, 0.09), strokeColor=ACCENT, strokeWidth=1
                )
            )
            group.translate(x, y)
            group.rotate(-40)
            return [group]

        items.append(
            _legend_item(
                ellipse,
                f"{data['confidence']} confidence ellipse, {data['exaggeration_label']}",
                styles,
            )
        )
    for style, words in (
        ("baseline", "GNSS baseline"),
        ("distance", "Distance measured"),
        ("sighting", "Sighted only (direction, angle, azimuth)"),
        ("height", "Height difference only"),
    ):
        if present[style]:
            items.append(_legend_item(_legend_line(style), words, styles))
    if present["ignored"]:
        items.append(
            _legend_item(
                lambda x, y: [_line_shape("ignored", 1, y, 25, y, 1.0), *_ignored_mark(x, y, 0.8)],
                "Ignored observation (not used)",
                styles,
            )
        )
    if present["flagged"]:
        items.append(
            _legend_item(
                lambda x, y: [
                    Line(1, y - 4, 25, y - 4, strokeColor=FAIL, strokeWidth=1.6),
                    *_flag(x - 3, y - 4, 0.55),
                ],
                f"Flagged by the w-test (|w| > {data['critical_w']})",
                styles,
            )
        )
    per_row = 3
    rows = []
    for start in range(0, len(items), per_row):
        chunk = items[start : start + per_row]
        row: list[Any] = []
        for icon, words in chunk:
            row += [icon, words]
        row += [""] * (2 * per_row - len(row))
        rows.append(row)
    cell = width / per_row
    table = Table(
        rows or [[""]], colWidths=[28, cell - 28] * per_row if rows else [width], hAlign="LEFT"
    )
    table.setStyle(
        TableStyle(
            [
                ("VALIGN", (0, 0), (-1, -1), "MIDDLE"),
                ("LEFTPADDING", (0, 0), (-1, -1), 0),
                ("RIGHTPADDING", (0, 0), (-1, -1), 2),
                ("TOPPADDING", (0, 0), (-1, -1), 1),
                ("BOTTOMPADDING", (0, 0), (-1, -1), 1),
            ]
        )
    )
    return table


# --------------------------------------------------------------------------------------
# histogram


def histogram_drawing(h: histogram.Histogram, width: float, height: float, fonts: Fonts) -> Drawing:
    """Bars of w, the expected counts under the standard normal curve, the critical values."""
    g = histogram.layout(h, width, height, margin=(16.0, 8.0, 26.0, 30.0))
    drawing = Drawing(width, height)

    def flip(y: float) -> float:
        return height - y

    for y, _ in g.y_ticks:
        drawing.add(Line(g.left, flip(y), g.right, flip(y), strokeColor=STRIPE, strokeWidth=0.8))
    for b in g.bars:
        if not b.count:
            continue
        drawing.add(
            Rect(
                b.x + 0.4,
                flip(b.y + b.height),
                max(b.width - 0.8, 0.3),
                b.height,
                fillColor=FAIL if b.beyond else colors.HexColor("#b9c7d6"),
                strokeColor=FAIL if b.beyond else SLATE,
                strokeWidth=0.5,
            )
        )
        if b.beyond or b.overflow:
            drawing.add(
                String(
                    b.x + b.width / 2,
                    flip(b.y) + 3,
                    str(b.count),
                    fontName=fonts.bold,
                    fontSize=7,
                    fillColor=FAIL if b.beyond else INK,
                    textAnchor="middle",
                )
            )
    points: list[float] = []
    for x, y in g.curve:
        points += [x, flip(y)]
    drawing.add(PolyLine(points, strokeColor=ACCENT, strokeWidth=1.5))
    for x, sign in zip(g.critical_x, ("−", "+"), strict=True):
        drawing.add(
            Line(
                x,
                flip(g.top),
                x,
                flip(g.bottom),
                strokeColor=FAIL,
                strokeWidth=0.9,
                strokeDashArray=[4, 2.5],
            )
        )
        drawing.add(
            String(
                x + (3 if sign == "+" else -3),
                flip(g.top) - 8,
                plain(f"{sign}{g.critical_label}", fonts),
                fontName=fonts.regular,
                fontSize=7,
                fillColor=FAIL,
                textAnchor="start" if sign == "+" else "end",
            )
        )
    drawing.add(
        Line(g.left, flip(g.bottom), g.right, flip(g.bottom), strokeColor=INK, strokeWidth=0.7)
    )
    drawing.add(Line(g.left, flip(g.top), g.left, flip(g.bottom), strokeColor=INK, strokeWidth=0.7))
    for x, label in g.x_ticks:
        drawing.add(
            Line(x, flip(g.bottom), x, flip(g.bottom) - 3, strokeColor=INK, strokeWidth=0.7)
        )
        drawing.add(
            String(
                x,
                flip(g.bottom) - 11,
                plain(label, fonts),
                fontName=fonts.regular,
                fontSize=7,
                fillColor=INK,
                textAnchor="middle",
            )
        )
    for y, label in g.y_ticks:
        drawing.add(
            String(
                g.left - 4,
                flip(y) - 2.5,
                label,
                fontName=fonts.regular,
                fontSize=7,
                fillColor=INK,
                textAnchor="end",
            )
        )
    drawing.add(
        String(
            (g.left + g.right) / 2,
            2,
            "standardized residual w",
            fontName=fonts.regular,
            fontSize=7.4,
            fillColor=INK,
            textAnchor="middle",
        )
    )
    drawing.add(
        String(
            g.left - 24,
            flip(g.top) + 5,
            "count",
            fontName=fonts.regular,
            fontSize=7,
            fillColor=MUTED,
        )
    )
    return drawing
