"""The report layer: HTML, text and CSV show the result's figures, formatted, never recomputed."""

from __future__ import annotations

import csv
import dataclasses
import io
import re
from datetime import UTC, datetime
from pathlib import Path

import pytest

from server import __version__
from server.pipeline import adjust_fieldbook
from server.report import csv_export
from server.report import html as html_report
from server.report import tables as report
from server.report import text as text_report
from server.results.result import (
    CAUTION,
    AdjustmentResult,
    Ellipse,
    GlobalTest,
    ObservationResult,
    PointResult,
    Summary,
)

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"
BLUNDER_LINE = 38  # tools/DEMOS.md: leveling_blunder.fieldbook, +10 mm on level KR-106 KR-107


@pytest.fixture(scope="module")
def blunder() -> AdjustmentResult:
    path = DEMOS / "leveling_blunder.fieldbook"
    return adjust_fieldbook(path.read_bytes(), source=path.name)


@pytest.fixture(scope="module")
def clean() -> AdjustmentResult:
    path = DEMOS / "leveling_clean.fieldbook"
    return adjust_fieldbook(path.read_bytes(), source=path.name)


def _summary(**changes: object) -> Summary:
    base = Summary(
        dimension=2,
        points=2,
        observations=1,
        used_observations=1,
        unknowns=2,
        redundancy=3,
        iterations=2,
        converged=True,
        variance_factor=1.1,
        global_test=GlobalTest(statistic=3.3, lower=0.2, upper=9.3, alpha=0.05, passed=True),
        critical_w=3.2905,
        lambda0=17.075,
        ellipse_factor=2.45,
        alpha=0.05,
        snooping=0.001,
        power=0.80,
        confidence=0.95,
    )
    return dataclasses.replace(base, **changes)


def _built(
    points: tuple[PointResult, ...] = (),
    observations: tuple[ObservationResult, ...] = (),
    angle_unit: str = "dms",
    **changes: object,
) -> AdjustmentResult:
    """A hand-made result, for formatting cases no field book can produce."""
    return AdjustmentResult(
        title="Hand-made",
        source="hand.fieldbook",
        length_unit="m",
        angle_unit=angle_unit,
        text_sha256="ab" * 32,
        summary=_summary(**changes),
        points=points,
        observations=observations,
        misclosures=(),
        relative=(),
        warnings=(),
    )


def _point(name: str, **changes: object) -> PointResult:
    base = PointResult(
        name=name,
        east=None,
        north=None,
        height=None,
        sd_east=None,
        sd_north=None,
        sd_height=None,
        fixed="",
        weighted="",
        ellipse=None,
    )
    return dataclasses.replace(base, **changes)


def _angle(value_deg: float, residual_arcsec: float) -> ObservationResult:
    return ObservationResult(
        line=7,
        kind="angle",
        from_point="B",
        at="A",
        to="C",
        observed=value_deg,
        adjusted=value_deg + residual_arcsec / 3600,
        residual=residual_arcsec,
        sd=2.0,
        redundancy=0.5,
        w=-1.234,
        mdb=11.66,
        flagged=False,
        ignored=False,
    )


# ---------------------------------------------------------------------------------------
# HTML report


def test_report_shows_caution_at_top_and_bottom(blunder):
    html = html_report.report_html(blunder)
    assert html.count(CAUTION) == 2
    body = html.split("<body>", 1)[1]
    # once before the verdict and once after the observations
    order = [
        body.index(CAUTION),
        body.index("Fails"),
        body.index("Observations"),
        body.rindex(CAUTION),
    ]
    assert order == sorted(order)


def test_report_identifies_the_field_book_and_software(blunder):
    html = html_report.report_html(blunder, generated=datetime(2024, 5, 9, 14, 30, tzinfo=UTC))
    assert blunder.text_sha256 in html
    assert re.fullmatch(r"[0-9a-f]{64}", blunder.text_sha256)
    assert f"Stationfit {__version__}" in html
    assert "2024-05-09 14:30 UTC" in html
    assert "leveling_blunder.fieldbook" in html


def test_report_names_the_datum_and_test_settings(blunder):
    html = html_report.report_html(blunder)
    assert "BM-TANNERY" in html and "BM-KESTREL" in html
    assert "held fixed" in html
    assert "|w| &gt; 3.29" in html  # critical value of the w-test at snooping 0.001
    assert "0.05" in html  # alpha of the global test


def test_report_verdict_says_fails_and_points_at_the_blunder(blunder):
    html = html_report.report_html(blunder)
    assert "Fails: residuals too large — look for blunders" in html
    row = _row_of_line(html, BLUNDER_LINE)
    assert "is-flagged" in row and "⚑ flagged" in row
    # only the blunder is flagged
    assert html.count("⚑ flagged") == 1


def test_report_heights_are_the_results_to_a_tenth_of_a_millimetre(blunder):
    html = html_report.report_html(blunder)
    assert len(blunder.points) == 30  # the demo's marks (tools/DEMOS.md)
    for p in blunder.points:
        assert p.height is not None and f">{p.height:.4f}<" in html, p.name


def test_report_marks_loops_over_the_allowance(blunder):
    html = html_report.report_html(blunder)
    exceeded = [m for m in blunder.misclosures if m.exceeds]
    assert exceeded, "the demo has loops over the allowance (tools/DEMOS.md)"
    assert html.count("✕ exceeds") == len(exceeded)


def test_report_is_self_contained_and_printable(blunder):
    html = html_report.report_html(blunder)
    assert "<script" not in html
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:)?//""", html)
    assert "<link" not in html
    # header rows repeat on every printed page; rows do not split
    assert "display: table-header-group" in html
    assert "break-inside: avoid" in html


def test_report_warnings_are_numbered(blunder):
    html = html_report.report_html(blunder)
    assert blunder.warnings
    assert '<ol class="warnings">' in html
    for warning in blunder.warnings:
        assert warning in html


def test_report_escapes_point_names():
    name = "<script>alert(1)</script>"
    result = _built(points=(_point(name, height=1.0, sd_height=0.0, fixed="h"),), dimension=1)
    html = html_report.report_html(result)
    assert name not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html


def test_style_hash_matches_the_inline_style(blunder):
    import base64
    import hashlib

    html = html_report.report_html(blunder)
    style = re.search(r"<style>(.*?)</style>", html, re.DOTALL).group(1)
    digest = base64.b64encode(hashlib.sha256(style.encode()).digest()).decode()
    assert html_report.style_hash() == f"'sha256-{digest}'"


# ---------------------------------------------------------------------------------------
# formatting


@pytest.mark.parametrize(
    ("value", "text"),
    [
        (0.00004, "0.0000"),
        (-0.00004, "0.0000"),
        (-0.00005001, "-0.0001"),
        (84.85674999, "84.8567"),
        (None, "—"),
    ],
)
def test_lengths_to_a_tenth_of_a_millimetre_without_negative_zero(value, text):
    assert report.fmt_length(value, "m") == text


def test_angles_follow_the_field_books_unit():
    observation = _angle(87.24208333333, 1.26)
    dms = report.observation_rows(_built(observations=(observation,)))[0]
    assert dms.observed == "87:14:31.5"
    assert dms.residual == "1.3"  # arc-seconds to 0.1
    deg = report.observation_rows(_built(observations=(observation,), angle_unit="deg"))[0]
    assert deg.observed == "87.242083"
    assert deg.w == "-1.23" and deg.mdb == "11.7"


def test_ellipse_azimuth_in_dms_and_axes_in_length_units():
    ellipse = Ellipse(semi_major=0.01234, semi_minor=0.0051, azimuth=164.5947, confidence=0.95)
    point = _point(
        "LF-101",
        east=511182.02651,
        north=182624.72409,
        sd_east=0.0017,
        sd_north=0.0026,
        ellipse=ellipse,
    )
    row = report.point_rows(_built(points=(point,)))[0]
    assert (row.east, row.north) == ("511182.0265", "182624.7241")
    assert (row.semi_major, row.semi_minor, row.azimuth) == ("0.0123", "0.0051", "164:35:41")
    assert row.height == "—"


# ---------------------------------------------------------------------------------------
# verdicts


def test_verdict_passes_for_the_clean_demo(clean):
    verdict = report.verdict(clean)
    assert verdict.state == "pass"
    assert verdict.headline.startswith("Passes: the residuals agree")
    assert verdict.flagged == 0


def test_verdict_fails_for_the_blunder_demo(blunder):
    verdict = report.verdict(blunder)
    assert verdict.state == "fail"
    assert verdict.flagged == 1
    assert f"line {BLUNDER_LINE}" in verdict.detail


def test_verdict_without_redundancy_says_a_blunder_cannot_be_detected():
    result = adjust_fieldbook(
        "defaults level=1mm\npoint BM height=10 fix\nlevel BM NEW 1.0\n", source="spur.fieldbook"
    )
    verdict = report.verdict(result)
    assert verdict.state == "none"
    assert "cannot be detected" in verdict.headline


def test_verdict_too_small_residuals_points_at_pessimistic_sigmas():
    test = GlobalTest(statistic=0.1, lower=0.2, upper=9.3, alpha=0.05, passed=False)
    verdict = report.verdict(_built(global_test=test))
    assert verdict.state == "fail"
    assert "pessimistic" in verdict.headline


def test_verdict_not_converged_overrides_a_passing_test():
    verdict = report.verdict(_built(converged=False))
    assert verdict.state == "fail"
    assert "Not converged" in verdict.headline


# ---------------------------------------------------------------------------------------
# CSV


@pytest.mark.parametrize("name", ["=cmd|' /C calc'!A0", "+1", "-2", "@SUM(A1)", "\tTAB"])
def test_csv_guards_names_that_a_spreadsheet_would_run(name):
    result = _built(points=(_point(name, height=-1.23456, sd_height=0.0001),), dimension=1)
    (row,) = list(csv.DictReader(io.StringIO(csv_export.points_csv(result))))
    assert row["name"] == "'" + name


def test_csv_keeps_negative_numbers_as_numbers():
    point = _point("BM-1", east=-12.34567, north=5.0, height=-1.23456, sd_height=0.0001)
    (row,) = list(csv.DictReader(io.StringIO(csv_export.points_csv(_built(points=(point,))))))
    assert row["height"] == "-1.2346"
    assert row["east"] == "-12.3457"
    assert float(row["height"]) == pytest.approx(-1.2346)
    assert row["name"] == "BM-1"


def test_csv_has_every_point_with_its_datum(blunder):
    rows = list(csv.DictReader(io.StringIO(csv_export.points_csv(blunder))))
    assert [r["name"] for r in rows] == [p.name for p in blunder.points]
    assert list(rows[0]) == list(csv_export.POINT_CSV_HEADER)
    fixed = {r["name"] for r in rows if r["fixed"] == "h"}
    assert fixed == {"BM-TANNERY", "BM-KESTREL"}
    # a 1D network has no positions and no ellipses: empty cells, not zeros
    assert all(r["east"] == "" and r["semi_major"] == "" for r in rows)
    for r, p in zip(rows, blunder.points, strict=True):
        assert r["height"] == f"{p.height:.4f}"


# ---------------------------------------------------------------------------------------
# text


def test_text_summary_for_the_terminal(blunder):
    text = text_report.report_text(blunder)
    assert "FAILS" in text
    flagged = text.split("Flagged observations", 1)[1].split("Warnings", 1)[0]
    assert re.search(rf"^\s*{BLUNDER_LINE}\s+level\s+KR-106 → KR-107", flagged, re.MULTILINE)
    assert "1. " in text.split("Warnings", 1)[1]
    assert text.rstrip().endswith(CAUTION)
    assert blunder.text_sha256 in text


def test_text_summary_says_none_flagged_for_the_clean_demo(clean):
    text = text_report.report_text(clean)
    assert text.startswith(f"Stationfit {__version__}")
    assert "PASSES" in text
    assert re.search(r"Flagged observations \(\|w\| > 3\.29, largest first\)\nnone\n", text)


def test_text_summary_lists_the_largest_w_first():
    """network_direction_blunder: the +30″ slip on line 94 has the largest |w| (tools/DEMOS.md)."""
    path = DEMOS / "network_direction_blunder.fieldbook"
    result = adjust_fieldbook(path.read_bytes(), source=path.name)
    section = text_report.report_text(result).split("largest first)", 1)[1].split("\n\n", 1)[0]
    lines = [int(row.split()[0]) for row in section.splitlines() if re.match(r"\s*\d+\s", row)]
    assert lines[0] == 94
    by_w = sorted((o for o in result.observations if o.flagged), key=lambda o: -abs(o.w))
    assert lines == [o.line for o in by_w]


def _row_of_line(html: str, line: int) -> str:
    """The <tr> of the observation on field book line ``line``."""
    for row in re.findall(r"<tr[^>]*>.*?</tr>", html, re.DOTALL):
        cells = re.findall(r"<td[^>]*>(.*?)</td>", row, re.DOTALL)
        if cells and cells[0].strip() == str(line) and "level" in row:
            return row
    raise AssertionError(f"no observation row for line {line}")
