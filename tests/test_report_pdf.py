"""The PDF report: a valid document a reviewing surveyor can file.

Checked with pypdf's text extraction (what the document says, page by page)
and with poppler's pdftoppm (that it draws: tables, the network plot and the
histogram leave ink where they should).
"""

from __future__ import annotations

import functools
import io
import math
import re
import shutil
import subprocess
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pypdf
import pytest
from PIL import Image
from reportlab.graphics.shapes import Ellipse, Group

from server import __version__
from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_fieldbook, adjust_parsed
from server.report.pdf import report_pdf
from server.report.pdf_drawings import network_drawing
from server.report.pdf_kit import load_fonts
from server.report.plot import network_plot_data
from server.results.result import CAUTION, AdjustmentResult
from server.review.standards import PRESETS, with_presets

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"
WHEN = datetime(2026, 3, 2, 9, 15, tzinfo=UTC)
BLUNDER_LINE = 38  # tools/DEMOS.md: leveling_blunder.fieldbook, +10 mm on level KR-106 KR-107
#: Colours the drawings use (pdf_kit): the flag red and the ellipse and curve blue.
FAIL_RGB = (0xA3, 0x32, 0x2A)
ACCENT_RGB = (0x1D, 0x5B, 0x8F)

# Names and notes that are reportlab Paragraph markup; all valid in a field book.
MARKUP = """fieldbook 1
title "<b>Bold</b> & <i>co</i> <br/> x"
defaults level=1mm
point <b>x</b>&amp; height=5.0000 fix
point +1 height=10 fix
level <b>x</b>&amp; @A1 +6.0010
level -X @A1 +1.0000
level <b>x</b>&amp; -X +5.0000
level +1 -X 1.0
level +1 @A1 0.0 note="<font size=40>big</font> & <unclosed"
"""


def _adjusted(name: str) -> AdjustmentResult:
    path = DEMOS / f"{name}.fieldbook"
    return adjust_fieldbook(path.read_bytes(), source=path.name)


@pytest.fixture(scope="module")
def network() -> AdjustmentResult:
    return _adjusted("control_network")


@pytest.fixture(scope="module")
def network_pdf(network: AdjustmentResult) -> bytes:
    return report_pdf(network, generated=WHEN)


@pytest.fixture(scope="module")
def blunder() -> AdjustmentResult:
    return _adjusted("leveling_blunder")


@pytest.fixture(scope="module")
def blunder_pdf(blunder: AdjustmentResult) -> bytes:
    return report_pdf(blunder, generated=WHEN)


@pytest.fixture(scope="module")
def directions() -> AdjustmentResult:
    return _adjusted("network_direction_blunder")


@pytest.fixture(scope="module")
def directions_pdf(directions: AdjustmentResult) -> bytes:
    return report_pdf(directions, generated=WHEN)


@functools.cache
def _pages(pdf: bytes) -> tuple[str, ...]:
    """Each page's text with runs of white space made one space (lines wrap anywhere)."""
    reader = pypdf.PdfReader(io.BytesIO(pdf))
    return tuple(re.sub(r"\s+", " ", page.extract_text()) for page in reader.pages)


# ---------------------------------------------------------------------------------------
# what the document says


def test_pdf_is_a_valid_document_that_names_itself(network, network_pdf):
    assert network_pdf.startswith(b"%PDF-") and network_pdf.rstrip().endswith(b"%%EOF")
    reader = pypdf.PdfReader(io.BytesIO(network_pdf), strict=True)
    assert len(reader.pages) >= 3
    meta = reader.metadata
    assert network.title in meta.title
    assert network.text_sha256 in meta.subject
    assert meta.author == f"Stationfit {__version__}"


@pytest.mark.parametrize("which", ["network_pdf", "blunder_pdf", "directions_pdf"])
def test_caution_hash_and_page_number_on_every_page(which, request):
    pdf = request.getfixturevalue(which)
    result = request.getfixturevalue(which.removesuffix("_pdf"))
    pages = _pages(pdf)
    assert len(pages) >= 2 and all(pages), "every page has text to check"
    for number, text in enumerate(pages, start=1):
        assert CAUTION in text, f"page {number} lacks the caution"
        assert f"Page {number} of {len(pages)}" in text, number
        assert f"Field book SHA-256 {result.text_sha256}" in text, number


def test_first_page_identifies_field_book_software_and_date(network, network_pdf):
    first = _pages(network_pdf)[0]
    assert re.fullmatch(r"[0-9a-f]{64}", network.text_sha256)
    assert f"SHA-256 of the field book {network.text_sha256}" in first
    assert f"Stationfit {__version__}" in first
    assert "2026-03-02 09:15 UTC" in first
    assert "control_network.fieldbook" in first
    # datum: the three county points held fixed
    for name in ("HARROW", "LINDEN", "WEIR"):
        assert f"{name} held fixed — position" in first


def test_first_page_gives_the_verdict_and_the_standards_in_words(blunder, blunder_pdf):
    first = _pages(blunder_pdf)[0]
    test = blunder.summary.global_test
    assert "Fails: residuals too large — look for blunders" in first
    assert f"accepted between {test.lower:.2f} and {test.upper:.2f}" in first
    assert f"line {BLUNDER_LINE}" in first
    exceeded = sum(m.exceeds for m in blunder.misclosures)
    assert exceeded == 2  # tools/DEMOS.md: the blunder opens two circuits
    assert (
        f"Leveling misclosures. Fail: {exceeded} of {len(blunder.misclosures)} loops and runs "
        "exceed the allowance"
    ) in first


def test_settings_state_the_ellipse_factor_and_its_convention(network, network_pdf):
    """The reader must be able to tell which 95 % factor the ellipses carry (docs/standards.md)."""
    first = _pages(network_pdf)[0]
    s = network.summary
    assert (
        f"k = √(2·F(95%; 2, r)) = {s.ellipse_factor:.4f} for r = {s.redundancy} degrees of freedom"
    ) in first
    assert "Significance of the global test α 0.05" in first
    assert "Directions (92) 1.5 to 2.6″" in first  # a priori sd actually used, by kind


def test_every_point_and_observation_is_listed(network, network_pdf):
    text = " ".join(_pages(network_pdf))
    for p in network.points:
        assert f"{p.name} {p.east:.4f} {p.north:.4f}" in text, p.name
    lines = [
        int(n) for n in re.findall(r"(?:^| )(\d{2,3}) (?:distance|direction|angle|azimuth) ", text)
    ]
    assert sorted(set(lines)) == sorted(o.line for o in network.observations)


def test_observation_table_repeats_its_header_on_every_page_it_runs_onto(network, network_pdf):
    pages = _pages(network_pdf)
    header = (
        "Line Kind Marks Booked (m / D:M:S) Used Residual (m / ″) sd (m / ″) r w "
        "Est. bias (m / ″) MDB"
    )
    with_rows = [
        i
        for i, text in enumerate(pages)
        if re.search(r" \d{2,3} (distance|direction|angle|azimuth) [A-Z]", text)
    ]
    assert len(with_rows) >= 3  # 166 observations do not fit on fewer pages
    assert with_rows == list(range(with_rows[0], with_rows[-1] + 1))
    for i in with_rows:
        assert header in pages[i], f"page {i + 1} has rows without the header"


def test_flagged_observations_are_marked_in_words(directions, directions_pdf):
    text = " ".join(_pages(directions_pdf))
    flagged = [o for o in directions.observations if o.flagged]
    assert flagged
    assert text.count("⚑ flagged") == len(flagged)
    worst = max(flagged, key=lambda o: abs(o.w))
    # the estimated bias −v/r stands beside w
    assert (
        f"{worst.residual:.1f}″ {worst.sd:.1f}″ {worst.redundancy:.2f} {worst.w:.2f} "
        f"{-worst.residual / worst.redundancy:.1f}″ {worst.mdb:.1f}″ ⚑ flagged" in text
    )


def test_relative_precision_table_says_meets_or_fails(network, network_pdf):
    text = " ".join(_pages(network_pdf))
    assert "Relative precision between point pairs" in text
    assert text.count("✓ meets") == sum(r.passed is True for r in network.relative)
    first = network.relative[0]
    assert (
        f"{first.from_point} {first.to_point} joined {first.distance:.4f} {first.sd_distance:.4f} "
        f"{first.semi_major:.4f}"
    ) in text


def test_preset_is_named_with_its_source_and_status(blunder):
    """A preset recalled from memory says so in the deliverable
    (docs/references.md "FGCC 1984 leveling allowances")."""
    preset = PRESETS["fgcc-1984-first-order-class-I"]
    path = DEMOS / "leveling_blunder.fieldbook"
    fieldbook = with_presets(
        parse_fieldbook(path.read_bytes(), source=path.name), misclosure=preset.key
    )
    result = adjust_parsed(fieldbook)
    text = " ".join(_pages(report_pdf(result, presets=[preset])))
    assert f"Allowance: {preset.label} (preset)" in text
    assert "not yet checked against the published document" in text
    exceeded = sum(m.exceeds for m in result.misclosures)
    assert f"Fail: {exceeded} of {len(result.misclosures)} loops and runs" in text


def test_height_network_has_histogram_but_no_network_plot(blunder_pdf):
    text = " ".join(_pages(blunder_pdf))
    assert "Standardized residuals" in text
    assert "Grid north up" not in text
    assert "standardized residual w" in text  # the histogram's axis title


def test_user_text_is_never_read_as_markup():
    result = adjust_fieldbook(MARKUP, source="markup.fieldbook")
    text = " ".join(_pages(report_pdf(result)))
    assert "<b>x</b>&amp;" in text
    assert "<font size=40>big</font> & <unclosed" in text
    assert "<b>Bold</b> & <i>co</i> <br/> x" in text


def test_without_dejavu_the_report_falls_back_to_helvetica_with_ascii(network, tmp_path):
    pdf = report_pdf(network, font_dir=tmp_path)  # an empty folder: no DejaVu faces
    pages = _pages(pdf)
    for number, text in enumerate(pages, start=1):
        assert CAUTION in text and f"Page {number} of {len(pages)}" in text
    text = " ".join(pages)
    assert "sqrt (2·F(95%; 2, r))" in text
    assert "√" not in text and "σ" not in text


def test_page_size_can_be_a4_and_is_checked(blunder):
    reader = pypdf.PdfReader(io.BytesIO(report_pdf(blunder, page_size="a4")))
    box = reader.pages[0].mediabox
    assert (round(float(box.width)), round(float(box.height))) == (595, 842)
    with pytest.raises(ValueError, match="letter, a4"):
        report_pdf(blunder, page_size="legal")


# ---------------------------------------------------------------------------------------
# that it draws (pdftoppm)


def _render(pdf: bytes, tmp_path: Path, dpi: int = 50) -> list[Image.Image]:
    if shutil.which("pdftoppm") is None:
        pytest.skip(
            "pdftoppm (Debian poppler-utils) is not installed; scripts/install --test "
            "installs it when run as root"
        )
    source = tmp_path / "report.pdf"
    source.write_bytes(pdf)
    subprocess.run(
        ["pdftoppm", "-r", str(dpi), "-png", str(source), str(tmp_path / "page")],
        check=True,
        capture_output=True,
        timeout=120,
    )
    files = sorted(tmp_path.glob("page-*.png"), key=lambda p: int(p.stem.split("-")[1]))
    return [Image.open(f).convert("RGB") for f in files]


def _share(image: Image.Image, test) -> float:
    """The share of the image's pixels for which ``test`` (on an H×W×3 array) holds."""
    return float(np.mean(test(np.asarray(image, dtype=np.int16))))


def _near(rgb: tuple[int, int, int], tolerance: int = 40):
    return lambda px: np.all(np.abs(px - np.array(rgb)) <= tolerance, axis=-1)


def _dark(px: np.ndarray) -> np.ndarray:
    return px.sum(axis=-1) < 3 * 90


def test_every_page_renders_with_ink(directions_pdf, tmp_path):
    images = _render(directions_pdf, tmp_path)
    assert len(images) == len(_pages(directions_pdf))
    for number, image in enumerate(images, start=1):
        assert image.size[0] < image.size[1]  # portrait
        assert 0.002 < _share(image, _dark) < 0.5, f"page {number} looks blank or black"


def test_network_plot_draws_flags_and_ellipses(directions_pdf, tmp_path):
    images = _render(directions_pdf, tmp_path, dpi=60)
    pages = _pages(directions_pdf)
    plot_page = next(i for i, text in enumerate(pages) if "Grid north up" in text)
    image = images[plot_page]
    # the plot is the upper half of its page: flagged lines in red, ellipses in blue
    upper = image.crop((0, 0, image.size[0], image.size[1] // 2))
    assert _share(upper, _near(FAIL_RGB, 60)) > 0.001
    assert _share(upper, _near(ACCENT_RGB, 60)) > 0.001
    lower = image.crop((0, image.size[1] // 2, image.size[0], image.size[1]))
    assert _share(lower, _near(FAIL_RGB, 30)) < _share(upper, _near(FAIL_RGB, 30))


def test_histogram_draws_its_curve_and_the_flagged_bar(blunder_pdf, tmp_path):
    images = _render(blunder_pdf, tmp_path, dpi=60)
    pages = _pages(blunder_pdf)
    page = next(i for i, text in enumerate(pages) if "standardized residual w" in text)
    assert _share(images[page], _near(ACCENT_RGB, 50)) > 0.0005  # the normal curve
    assert _share(images[page], _near(FAIL_RGB, 40)) > 0.0002  # the bar of line 38's w


def test_ellipses_are_drawn_along_their_azimuth(directions):
    """The major axis must point along the azimuth, clockwise from grid north (y up in PDF)."""
    data = network_plot_data(directions)
    drawing = network_drawing(data, 500, load_fonts())
    groups = [
        g for g in drawing.contents if isinstance(g, Group) and isinstance(g.contents[0], Ellipse)
    ]
    with_ellipse = [p for p in data["points"] if p["ellipse"] is not None]
    assert len(groups) == len(with_ellipse) > 0
    for group, point in zip(groups, with_ellipse, strict=True):
        _, _, c, d, _, _ = group.transform
        azimuth = math.radians(point["ellipse"]["azimuth"])
        # the local y axis (the semi-major axis) maps to (c, d): east = sin az, north = cos az
        assert (c, d) == pytest.approx((math.sin(azimuth), math.cos(azimuth)), abs=1e-9)
        assert group.contents[0].ry >= group.contents[0].rx


def test_the_report_names_the_field_book_by_its_file_name_not_its_folders(tmp_path):
    """A report leaves the office: the surveyor's folders are nobody else's business."""
    from server.report.html import report_html

    folder = tmp_path / "jobs" / "client-private"
    folder.mkdir(parents=True)
    path = folder / "spur.fieldbook"
    # a point named once like a declared one gives a warning, which names the file and line
    path.write_text(
        "defaults level=1mm/sqrtkm\npoint BM-21 height=100 fix\n"
        "point BM-30 height=101 fix\nlevel BM-21 TP1 +0.5 len=0.3km\n"
        "level TP1 BM-30 +0.5 len=0.3km\nlevel TP1 BM-12 +0.2 len=0.1km\n"
    )
    result = adjust_fieldbook(path.read_bytes(), source=str(path))
    assert any(w.startswith(f"{path}:6:") for w in result.warnings)  # the JSON keeps it whole
    text = " ".join(_pages(report_pdf(result, generated=WHEN)))
    html = report_html(result, generated=WHEN)
    for document in (text, html):
        assert "client-private" not in document and str(tmp_path) not in document
        assert "spur.fieldbook:6: point BM-12" in document
    assert "Field book spur.fieldbook" in text
    assert "<dd>spur.fieldbook</dd>" in html


@pytest.mark.parametrize(
    ("source", "name"),
    [
        ("/home/ann/jobs/a.fieldbook", "a.fieldbook"),
        (r"C:\Users\ann\b.fieldbook", "b.fieldbook"),
        ("c.fieldbook", "c.fieldbook"),
        ("", ""),
    ],
)
def test_source_name_drops_the_folders_of_either_kind_of_path(source, name):
    from server.report.html import source_name

    assert source_name(source) == name
