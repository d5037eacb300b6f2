"""Building blocks of the PDF report: fonts, text safe for reportlab, styles and tables.

* **Fonts.**  DejaVu Sans (Debian's ``fonts-dejavu-core``; the condensed and
  oblique faces of ``fonts-dejavu-extra`` when present) shows σ, ″, √, ±,
  χ² and the check marks.  Without it the built-in Helvetica is used and
  those characters are written with ASCII stand-ins (``plain``).
* **Text.**  Every piece of user text (title, point names, notes, warnings)
  goes through ``Styles.text``, which XML-escapes it before it enters
  Paragraph markup; ``Styles.para`` never reads its text as markup.
* **Tables** are ``LongTable``s whose header row repeats on every page they
  run onto (``repeatRows=1``); rows never split across pages.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from xml.sax.saxutils import escape

from reportlab.lib import colors
from reportlab.lib.enums import TA_RIGHT
from reportlab.lib.styles import ParagraphStyle
from reportlab.pdfbase import pdfmetrics
from reportlab.pdfbase.ttfonts import TTFont
from reportlab.platypus import Flowable, LongTable, Paragraph, Table, TableStyle

#: Where Debian's fonts-dejavu-core puts its fonts.
FONT_DIR = Path("/usr/share/fonts/truetype/dejavu")

INK = colors.HexColor("#17212b")
MUTED = colors.HexColor("#5f6b78")
RULE = colors.HexColor("#c4ccd5")
STRIPE = colors.HexColor("#f3f5f8")
ACCENT = colors.HexColor("#1d5b8f")
SLATE = colors.HexColor("#5f6e7d")
PALE = colors.HexColor("#a2adb8")
STATE_COLOURS = {
    "pass": (colors.HexColor("#1d6a4d"), colors.HexColor("#e7f3ed")),
    "warn": (colors.HexColor("#7b5800"), colors.HexColor("#fcf4df")),
    "none": (colors.HexColor("#7b5800"), colors.HexColor("#fcf4df")),
    "fail": (colors.HexColor("#a3322a"), colors.HexColor("#fcebea")),
}
FAIL, FAIL_BG = STATE_COLOURS["fail"]
WHITE = colors.white


# --------------------------------------------------------------------------------------
# fonts and text


@dataclass(frozen=True, slots=True)
class Fonts:
    """Font names registered with reportlab; ``unicode`` is False for the built-in fallback."""

    regular: str
    bold: str
    italic: str
    mono: str
    narrow: str
    narrow_bold: str
    unicode: bool


#: Faces in Debian's fonts-dejavu-core, without which the built-in fonts are used.
_DEJAVU_CORE = {
    "regular": "DejaVuSans.ttf",
    "bold": "DejaVuSans-Bold.ttf",
    "mono": "DejaVuSansMono.ttf",
}
#: Faces of fonts-dejavu-extra, used when present, else the core face named beside them.
_DEJAVU_EXTRA = {
    "italic": ("DejaVuSans-Oblique.ttf", "regular"),
    "narrow": ("DejaVuSansCondensed.ttf", "regular"),
    "narrow_bold": ("DejaVuSansCondensed-Bold.ttf", "bold"),
}
_BUILT_IN = Fonts(
    "Helvetica",
    "Helvetica-Bold",
    "Helvetica-Oblique",
    "Courier",
    "Helvetica",
    "Helvetica-Bold",
    unicode=False,
)
_registered: dict[Path, Fonts] = {}


def load_fonts(folder: Path | None = None) -> Fonts:
    """DejaVu from ``folder`` (default ``FONT_DIR``) if every face is there, else Helvetica."""
    folder = FONT_DIR if folder is None else folder
    if folder in _registered:
        return _registered[folder]
    paths = {role: folder / name for role, name in _DEJAVU_CORE.items()}
    if not all(p.is_file() for p in paths.values()):
        return _BUILT_IN
    for role, (name, _) in _DEJAVU_EXTRA.items():
        if (folder / name).is_file():
            paths[role] = folder / name
    names = {}
    for role, path in paths.items():
        name = f"Stationfit-{path.stem}"
        if name not in pdfmetrics.getRegisteredFontNames():
            pdfmetrics.registerFont(TTFont(name, str(path)))
        names[role] = name
    for role, (_, instead) in _DEJAVU_EXTRA.items():
        names.setdefault(role, names[instead])
    pdfmetrics.registerFontFamily(
        names["regular"],
        normal=names["regular"],
        bold=names["bold"],
        italic=names["italic"],
        boldItalic=names["bold"],
    )
    fonts = Fonts(unicode=True, **names)
    _registered[folder] = fonts
    return fonts


#: ASCII stand-ins for the characters Helvetica (WinAnsi) cannot show.
ASCII_STAND_INS = {
    "σ": "s",
    "\u0302": "",
    "ᵀ": "T",
    "₀": "0",
    "χ": "chi ",
    "√": "sqrt ",
    "″": '"',
    "′": "'",
    "✓": "OK",
    "✕": "X",
    "⚑": "!",
    "→": "->",
    "−": "-",
    "≤": "<=",
    "≥": ">=",
    "λ": "lambda",
    "α": "alpha",
    "β": "beta",
    "Δ": "D",
    "φ": "phi",
    "\u2009": " ",
    "\u2011": "-",
}
_ASCII_TABLE = str.maketrans(ASCII_STAND_INS)


def plain(text: str, fonts: Fonts) -> str:
    """The text as the font can show it: unchanged with DejaVu, ASCII stand-ins with Helvetica."""
    if fonts.unicode:
        return text
    return text.translate(_ASCII_TABLE).encode("cp1252", errors="replace").decode("cp1252")


# --------------------------------------------------------------------------------------
# styles


@dataclass(frozen=True, slots=True)
class Styles:
    """Paragraph styles of the report, all from one set of fonts."""

    fonts: Fonts
    body: ParagraphStyle
    small: ParagraphStyle
    note: ParagraphStyle
    title: ParagraphStyle
    kicker: ParagraphStyle
    h2: ParagraphStyle
    cell: ParagraphStyle
    cell_muted: ParagraphStyle
    cell_bold: ParagraphStyle
    cell_right: ParagraphStyle
    head: ParagraphStyle
    head_right: ParagraphStyle
    mono: ParagraphStyle
    footer: ParagraphStyle

    def text(self, value: str) -> str:
        """User or report text made safe for Paragraph markup."""
        return escape(plain(value, self.fonts))

    def para(self, value: str, style: ParagraphStyle | None = None) -> Paragraph:
        """A Paragraph of plain text (escaped, never read as markup)."""
        return Paragraph(self.text(value), style or self.body)

    def markup(self, value: str, style: ParagraphStyle | None = None) -> Paragraph:
        """A Paragraph of markup written here; every piece of user text in it is escaped already."""
        return Paragraph(value, style or self.body)


def make_styles(fonts: Fonts) -> Styles:
    """The report's paragraph styles."""
    body = ParagraphStyle("body", fontName=fonts.regular, fontSize=8.6, leading=11.2, textColor=INK)
    cell = ParagraphStyle("cell", parent=body, fontName=fonts.narrow, fontSize=6.9, leading=8.3)
    head = ParagraphStyle("head", parent=cell, fontName=fonts.narrow_bold)
    return Styles(
        fonts=fonts,
        body=body,
        small=ParagraphStyle("small", parent=body, fontSize=7.6, leading=9.6),
        note=ParagraphStyle(
            "note", parent=body, fontSize=7.4, leading=9.4, textColor=MUTED, spaceBefore=3
        ),
        title=ParagraphStyle(
            "title", parent=body, fontName=fonts.bold, fontSize=16, leading=19.5, spaceAfter=6
        ),
        kicker=ParagraphStyle("kicker", parent=body, fontSize=7.4, textColor=MUTED, leading=9),
        h2=ParagraphStyle(
            "h2",
            parent=body,
            fontName=fonts.bold,
            fontSize=10.6,
            leading=13,
            spaceBefore=11,
            spaceAfter=5,
        ),
        cell=cell,
        cell_muted=ParagraphStyle("cell_muted", parent=cell, textColor=MUTED),
        cell_bold=ParagraphStyle("cell_bold", parent=cell, fontName=fonts.narrow_bold),
        cell_right=ParagraphStyle("cell_right", parent=cell, alignment=TA_RIGHT),
        head=head,
        head_right=ParagraphStyle("head_right", parent=head, alignment=TA_RIGHT),
        mono=ParagraphStyle("mono", parent=body, fontName=fonts.mono, fontSize=7.6, leading=9.6),
        footer=ParagraphStyle(
            "footer", parent=body, fontName=fonts.italic, fontSize=6.7, leading=8.2, textColor=INK
        ),
    )


# --------------------------------------------------------------------------------------
# tables


@dataclass(frozen=True, slots=True)
class Column:
    """A table column: heading, width (None shares the rest), right-aligned numbers or not."""

    heading: str
    width: float | None = None
    numeric: bool = False
    weight: float = 1.0
    widest: float = 160.0


def _widths(columns: Sequence[Column], total: float) -> list[float]:
    """Fixed widths as given; the rest shared by weight, none wider than its ``widest``."""
    fixed = sum(c.width for c in columns if c.width is not None)
    weights = sum(c.weight for c in columns if c.width is None)
    rest = max(total - fixed, 0.0)
    return [
        c.width if c.width is not None else min(rest * c.weight / weights, c.widest)
        for c in columns
    ]


def data_table(
    styles: Styles,
    columns: Sequence[Column],
    rows: Sequence[Sequence[Any]],
    width: float,
    *,
    row_states: Sequence[str] = (),
) -> LongTable:
    """A table whose header repeats on every page; ``row_states`` may mark rows "bad" or "muted"."""
    header = [
        Paragraph(
            "<br/>".join(styles.text(part) for part in c.heading.split("\n")),
            styles.head_right if c.numeric else styles.head,
        )
        for c in columns
    ]
    body = []
    for row in rows:
        cells = []
        for _column, value in zip(columns, row, strict=True):
            cells.append(plain(value, styles.fonts) if isinstance(value, str) else value)
        body.append(cells)
    commands: list[tuple[Any, ...]] = [
        ("FONT", (0, 0), (-1, -1), styles.fonts.narrow, 6.9, 8.3),
        ("TEXTCOLOR", (0, 0), (-1, -1), INK),
        ("VALIGN", (0, 0), (-1, -1), "TOP"),
        ("LEFTPADDING", (0, 0), (-1, -1), 2.6),
        ("RIGHTPADDING", (0, 0), (-1, -1), 2.6),
        ("TOPPADDING", (0, 0), (-1, -1), 1.7),
        ("BOTTOMPADDING", (0, 0), (-1, -1), 1.9),
        ("LINEBELOW", (0, 0), (-1, 0), 0.9, INK),
        ("VALIGN", (0, 0), (-1, 0), "BOTTOM"),
        ("ROWBACKGROUNDS", (0, 1), (-1, -1), [WHITE, STRIPE]),
        ("LINEBELOW", (0, -1), (-1, -1), 0.5, RULE),
    ]
    for k, column in enumerate(columns):
        if column.numeric:
            commands.append(("ALIGN", (k, 1), (k, -1), "RIGHT"))
    for i, state in enumerate(row_states, start=1):
        if state == "bad":
            commands.append(("BACKGROUND", (0, i), (-1, i), FAIL_BG))
            commands.append(("LINEBEFORE", (0, i), (0, i), 2.4, FAIL))
        elif state == "muted":
            commands.append(("TEXTCOLOR", (0, i), (-1, i), MUTED))
    table = LongTable(
        [header, *body], colWidths=_widths(columns, width), repeatRows=1, hAlign="LEFT"
    )
    table.setStyle(TableStyle(commands))
    return table


def kv_table(
    styles: Styles, rows: Sequence[tuple[str, str]], width: float, label_share: float = 0.58
) -> Table:
    """Label–value pairs, labels muted, values right-aligned."""
    data = [
        [styles.para(label, styles.small), styles.para(value, styles.small)]
        for label, value in rows
    ]
    table = Table(data, colWidths=[width * label_share, width * (1 - label_share)], hAlign="LEFT")
    table.setStyle(
        TableStyle(
            [
                ("VALIGN", (0, 0), (-1, -1), "TOP"),
                ("LEFTPADDING", (0, 0), (-1, -1), 0),
                ("RIGHTPADDING", (0, 0), (-1, -1), 3),
                ("TOPPADDING", (0, 0), (-1, -1), 1.4),
                ("BOTTOMPADDING", (0, 0), (-1, -1), 1.6),
                ("LINEBELOW", (0, 0), (-1, -1), 0.4, STRIPE),
                ("TEXTCOLOR", (0, 0), (0, -1), MUTED),
            ]
        )
    )
    return table


def state_box(
    styles: Styles, state: str, symbol: str, paragraphs: list[Flowable], width: float
) -> Table:
    """A banner with a symbol and words (never colour alone), tinted by ``state``."""
    ink, background = STATE_COLOURS.get(state, STATE_COLOURS["none"])
    # the ASCII stand-ins of the fallback font ("OK", "X") need a wider, smaller mark
    size, mark_width = (15, 24) if styles.fonts.unicode else (10, 32)
    mark = Paragraph(
        f'<font color="{hex_colour(ink)}"><b>{styles.text(symbol)}</b></font>',
        ParagraphStyle(
            "mark", parent=styles.body, fontName=styles.fonts.bold, fontSize=size, leading=size + 2
        ),
    )
    table = Table([[mark, paragraphs]], colWidths=[mark_width, width - mark_width], hAlign="LEFT")
    table.setStyle(
        TableStyle(
            [
                ("BACKGROUND", (0, 0), (-1, -1), background),
                ("BOX", (0, 0), (-1, -1), 0.6, ink),
                ("LINEBEFORE", (0, 0), (0, -1), 4.5, ink),
                ("VALIGN", (0, 0), (-1, -1), "TOP"),
                ("LEFTPADDING", (0, 0), (0, -1), 7),
                ("TOPPADDING", (0, 0), (-1, -1), 5),
                ("BOTTOMPADDING", (0, 0), (-1, -1), 6),
            ]
        )
    )
    return table


def hex_colour(colour: colors.Color) -> str:
    return "#" + str(colour.hexval())[2:]
