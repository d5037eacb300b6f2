"""Booked versus used: the value as written, the reduction applied, the value adjusted; point notes.

A reviewer signs for the numbers in the field book, so every output shows
the booked value beside the value the adjustment used and what turned one
into the other (the combined scale factor for a distance).  The check
values below are the field book's own text and reductions worked by hand,
not the program's formula.
"""

from __future__ import annotations

import csv
import io
import re
import time
import warnings
from pathlib import Path

import pypdf
import pytest

from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_fieldbook
from server.report.csv_export import points_csv
from server.report.html import report_html
from server.report.pdf import report_pdf
from server.report.tables import observation_rows
from server.report.text import report_text
from server.web import create_app

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2
    from fastapi.testclient import TestClient

# A boundary corner C3 tied to two monuments (true position 1100, 2200).  The distances are
# grid distances divided by k = 0.99996 as booked in the field; the first angle is booked
# a full turn too large and the second as a negative angle, both legal in a field book.
SCALED = """fieldbook 1
title "Scaled boundary"
units length=m angle=dms
defaults distance=2mm+2ppm angle=3sec centering=0mm
point MON-1 east=1000.000 north=2000.000 fix note="brass cap, NE corner"
point MON-2 east=1300.000 north=2000.000 fix note="iron pipe"
point C3 note="rebar with cap"
scale factor=0.99996
distance MON-1 C3 223.6177
distance MON-2 C3 282.8530
angle MON-2 MON-1 C3 656:33:56.2
angle MON-1 MON-2 C3 -315:00:00.0
"""
DIST_1, DIST_2, ANGLE_1, ANGLE_2 = 9, 10, 11, 12


@pytest.fixture(scope="module")
def scaled():
    return adjust_fieldbook(SCALED, source="scaled.fieldbook")


def _by_line(result):
    return {o.line: o for o in result.observations}


def test_json_keeps_the_booked_value_exactly_and_the_used_value_after_the_scale_factor(scaled):
    data = scaled.to_json_dict()
    obs = {o["line"]: o for o in data["observations"]}
    # the booked number is the field book's own text, to the last bit
    assert obs[DIST_1]["booked"] == float("223.6177")
    assert obs[DIST_2]["booked"] == float("282.8530")
    # reduced by hand: 223.6177 − 223.6177 × 0.00004 = 223.6177 − 0.008944708 = 223.608755292
    assert obs[DIST_1]["observed"] == pytest.approx(223.608755292, abs=1e-9)
    # 282.8530 − 0.01131412 = 282.84168588
    assert obs[DIST_2]["observed"] == pytest.approx(282.84168588, abs=1e-9)
    assert obs[DIST_1]["scale_factor"] == 0.99996
    # angles: booked as written in decimal degrees, used in [0, 360)
    assert obs[ANGLE_1]["booked"] == pytest.approx(656 + 33 / 60 + 56.2 / 3600, abs=1e-12)
    assert obs[ANGLE_1]["observed"] == pytest.approx(296 + 33 / 60 + 56.2 / 3600, abs=1e-12)
    assert obs[ANGLE_2]["booked"] == -315.0
    assert obs[ANGLE_2]["observed"] == pytest.approx(45.0, abs=1e-12)
    assert obs[ANGLE_1]["scale_factor"] is None
    # the residual stays adjusted − used (the contract's meaning of "observed" is unchanged)
    difference = obs[DIST_1]["adjusted"] - obs[DIST_1]["observed"]
    assert obs[DIST_1]["residual"] == pytest.approx(difference, abs=1e-12)


def test_without_a_scale_factor_booked_equals_used_and_no_reduction_is_shown():
    text = SCALED.replace("scale factor=0.99996\n", "")
    result = adjust_fieldbook(text)
    distance = _by_line(result)[DIST_1 - 1]
    assert distance.booked == distance.observed == 223.6177
    assert distance.scale_factor == 1.0
    row = next(r for r in observation_rows(result) if r.line == DIST_1 - 1)
    assert (row.booked, row.reduction, row.observed) == ("223.6177", "—", "223.6177")


def test_scale_factor_applies_only_to_the_distances_after_it():
    text = SCALED.replace(
        "scale factor=0.99996\ndistance MON-1 C3 223.6177\n",
        "distance MON-1 C3 223.6088\nscale factor=0.99996\n",
    )
    by_line = _by_line(adjust_fieldbook(text))
    assert by_line[8].scale_factor == 1.0 and by_line[8].booked == by_line[8].observed
    assert by_line[10].scale_factor == 0.99996
    assert by_line[10].booked == 282.853


def test_booked_values_in_feet_and_gon_keep_their_own_units():
    text = """fieldbook 1
units length=ft angle=gon
defaults distance=0.01ft angle=1mgon centering=0mm
point A east=1000 north=1000 fix
point B east=1328.084 north=1000 fix
point C
scale factor=1.0002
distance A C 500.0000
distance B C 400.0000
angle B A C 337.5gon
"""
    by_line = _by_line(adjust_fieldbook(text))
    assert by_line[8].booked == pytest.approx(500.0, abs=1e-11)  # feet, not metres
    assert by_line[8].observed == pytest.approx(500.1, abs=1e-11)  # 500 × 1.0002
    assert by_line[10].booked == pytest.approx(303.75, abs=1e-11)  # 337.5 gon × 0.9 °/gon


def test_a_direction_in_a_round_keeps_its_booked_value():
    text = """fieldbook 1
defaults direction=2sec distance=2mm centering=0mm
point A east=0 north=0 fix
point B east=100 north=0 fix
point C east=0 north=100 fix
point P
directions P
  A -225:00:00
  B 45:00:00
  C 225:00:00
end
distance P A 70.7107
distance P B 70.7107
"""
    book = parse_fieldbook(text)
    direction = next(o for o in book.observations if o.line == 8)
    assert direction.booked == pytest.approx(-1.25 * 3.141592653589793, abs=1e-15)
    result = adjust_fieldbook(text)
    obs = _by_line(result)[8]
    assert obs.booked == pytest.approx(-225.0) and obs.observed == pytest.approx(135.0)
    row = next(r for r in observation_rows(result) if r.line == 8)
    assert (row.booked, row.reduction, row.observed) == ("-225:00:00.0", "+ 360°", "135:00:00.0")


def test_rows_show_booked_reduction_and_used(scaled):
    rows = {r.line: r for r in observation_rows(scaled)}
    assert (rows[DIST_1].booked, rows[DIST_1].reduction, rows[DIST_1].observed) == (
        "223.6177",
        "× 0.99996",
        "223.6088",
    )
    assert (rows[ANGLE_1].booked, rows[ANGLE_1].reduction, rows[ANGLE_1].observed) == (
        "656:33:56.2",
        "− 360°",
        "296:33:56.2",
    )
    assert (rows[ANGLE_2].booked, rows[ANGLE_2].reduction, rows[ANGLE_2].observed) == (
        "-315:00:00.0",
        "+ 360°",
        "45:00:00.0",
    )


def _cells(html: str, line: int) -> list[str]:
    match = re.search(rf"<tr[^>]*>\s*<td class=\"num\">{line}</td>(.*?)</tr>", html, re.DOTALL)
    assert match, f"no row for line {line}"
    return [
        re.sub(r"<[^>]+>", "", c).strip()
        for c in re.findall(r"<td[^>]*>(.*?)</td>", match.group(1), re.DOTALL)
    ]


def test_html_report_shows_booked_reduction_used_and_point_notes(scaled):
    html = report_html(scaled)
    assert re.search(
        r"<th[^>]*>Booked \(m / D:M:S\)</th>\s*<th[^>]*>Reduction</th>\s*"
        r"<th[^>]*>Used</th>",
        html,
    )
    cells = _cells(html, DIST_1)
    start = cells.index("223.6177")
    assert cells[start : start + 3] == ["223.6177", "× 0.99996", "223.6088"]
    assert "2 booked distances reduced by the scale factor 0.99996" in html
    for note in ("brass cap, NE corner", "iron pipe", "rebar with cap"):
        assert note in html


def test_text_report_names_the_scale_factor_and_the_point_notes(scaled):
    text = report_text(scaled)
    assert (
        "2 booked distances reduced by the scale factor 0.99996 (used = booked × factor)." in text
    )
    c3 = next(line for line in text.splitlines() if line.startswith("C3 "))
    assert c3.rstrip().endswith("rebar with cap")


def test_pdf_shows_the_reduction_and_the_point_notes(scaled):
    reader = pypdf.PdfReader(io.BytesIO(report_pdf(scaled)))
    text = re.sub(r"\s+", " ", " ".join(page.extract_text() for page in reader.pages))
    assert "223.6177 × 0.99996 223.6088" in text  # booked, its reduction, then used
    assert "656:33:56.2 − 360° 296:33:56.2" in text
    for note in ("brass cap, NE corner", "iron pipe", "rebar with cap"):
        assert note in text


def test_csv_and_json_carry_the_point_notes(scaled):
    rows = list(csv.DictReader(io.StringIO(points_csv(scaled))))
    assert {r["name"]: r["note"] for r in rows} == {
        "MON-1": "brass cap, NE corner",
        "MON-2": "iron pipe",
        "C3": "rebar with cap",
    }
    points = {p["name"]: p for p in scaled.to_json_dict()["points"]}
    assert points["C3"]["note"] == "rebar with cap"


def test_csv_note_that_looks_like_a_formula_is_neutralised():
    text = SCALED.replace('note="iron pipe"', 'note="=HYPERLINK(1)"')
    rows = list(csv.DictReader(io.StringIO(points_csv(adjust_fieldbook(text)))))
    assert next(r for r in rows if r["name"] == "MON-2")["note"] == "'=HYPERLINK(1)"


def test_results_page_shows_booked_reduction_used_and_escaped_notes(tmp_path: Path):
    text = SCALED.replace('note="iron pipe"', 'note="<b>iron</b> pipe"')
    with TestClient(create_app(tmp_path / "data")) as client:
        response = client.post(
            "/projects",
            files={"fieldbook": ("b.fieldbook", text.encode(), "text/plain")},
            follow_redirects=False,
        )
        assert response.status_code == 303
        url = response.headers["location"]
        page = client.get(url)
        # a browser upload is adjusted in the background: wait for the results (at most 30 s)
        for _ in range(300):
            if "refreshes every two seconds" not in page.text:
                break
            time.sleep(0.1)
            page = client.get(url)
        html = page.text
        row = re.search(rf'<tr[^>]*data-line="{DIST_1}"[^>]*>(.*?)</tr>', html, re.DOTALL)
        assert row
        cells = [
            re.sub(r"<[^>]+>", "", c).strip()
            for c in re.findall(r"<td[^>]*>(.*?)</td>", row.group(1), re.DOTALL)
        ]
        start = cells.index("223.6177")
        assert cells[start : start + 3] == ["223.6177", "× 0.99996", "223.6088"]
        assert re.search(r"<th[^>]*>Booked \(m / D:M:S\)</th>", html)
        assert "&lt;b&gt;iron&lt;/b&gt; pipe" in html and "<b>iron</b>" not in html
        assert "rebar with cap" in html
        body = client.get(f"{url}/result.json").json()
        distance = next(o for o in body["observations"] if o["line"] == DIST_1)
        assert distance["booked"] == 223.6177 and distance["scale_factor"] == 0.99996
