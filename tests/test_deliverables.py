"""What the surveyor hands on: standards checks, the HTML report's plots, exports and downloads.

Published check values name their source (docs/references.md); the FGCC
leveling constants are recalled from memory and the tests say so.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
import warnings
from pathlib import Path

import pypdf
import pytest
import scipy.stats

from server.cli import main
from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_fieldbook, adjust_parsed
from server.report import html as html_report
from server.report.csv_export import safe_cell
from server.report.histogram import BIN_WIDTH, expected_count, w_histogram
from server.report.tables import standards_summary
from server.results.result import CAUTION
from server.review.standards import FGCC_1984_LEVELING, PRESETS, with_presets
from server.units import LENGTH_FACTORS
from server.web import create_app

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2 and warns
    from fastapi.testclient import TestClient

ROOT = Path(__file__).resolve().parents[1]
DEMOS = ROOT / "demo_projects"
BLUNDER_LINE = 38  # tools/DEMOS.md: leveling_blunder.fieldbook, +10 mm on level KR-106 KR-107

#: One new point P from fixed A by a 400 m distance and an azimuth (σ_t given below).
TWO_POINTS = """
defaults distance=5mm azimuth={sigma}sec
point A east=1000 north=1000 fix
distance A P 400.000
azimuth A P 90:00:00
"""


def _adjusted(name: str):
    path = DEMOS / f"{name}.fieldbook"
    return adjust_fieldbook(path.read_bytes(), source=path.name)


@pytest.fixture(scope="module")
def blunder():
    return _adjusted("leveling_blunder")


@pytest.fixture(scope="module")
def network():
    return _adjusted("control_network")


@pytest.fixture
def client(tmp_path):
    with TestClient(create_app(tmp_path / "data")) as c:
        yield c


def _open_demo(client, name: str) -> str:
    response = client.post(f"/demos/{name}", follow_redirects=False)
    assert response.status_code == 303
    return response.headers["location"]


# ---------------------------------------------------------------------------------------
# relative precision and the presets' constants


@pytest.mark.parametrize(("sigma_arcsec", "passes"), [(10.0, False), (5.0, True)])
def test_relative_precision_two_point_case_against_the_alta_allowance(sigma_arcsec, passes):
    """Worked by hand: with no redundancy the relative ellipse A–P has semi-axes D·σ_t across
    and σ_d along the line, times √χ²(95 %; 2) = 2.4477 (FGDC-STD-007.3-1998 App. 3-A, quoted in
    docs/references.md "95 % factors"). ALTA/NSPS 2026 §3.E allows 2 cm + 50 ppm·D = 0.0400 m at
    400 m. σ_t = 10″: a = 2.4477 · 19.39 mm = 47.5 mm, fails; σ_t = 5″: 23.7 mm, meets."""
    fieldbook = parse_fieldbook(TWO_POINTS.format(sigma=sigma_arcsec))
    preset = PRESETS["alta-nsps-2026"]
    result = adjust_parsed(with_presets(fieldbook, relative=preset.key))
    (rel,) = result.relative
    across_m = 400.0 * sigma_arcsec / 206264.806
    assert rel.semi_major == pytest.approx(2.447747 * across_m, rel=1e-5)
    assert rel.semi_minor == pytest.approx(2.447747 * 0.005, rel=1e-5)
    assert rel.allowed == pytest.approx(0.0400, abs=1e-12)
    assert rel.passed is passes
    (check,) = standards_summary(result, [preset])
    assert check.allowance.startswith("ALTA/NSPS relative positional precision (preset)")
    assert check.state == ("pass" if passes else "fail")
    assert check.words == (
        "Pass: 1 joined pair within the allowance; pairs neither joined by an observation nor "
        "requested with “relative A B” were not checked"
        if passes
        else "Fail: 1 of 1 pair exceeds the allowance (1 joined pair checked)"
    )


def test_ellipse_factor_convention_both_branches(network):
    """√(2·F(0.95; 2, r)) with σ₀ estimated (references §2: r = 10 → 2.8645), and
    √χ²(0.95; 2) = 2.4477 without redundancy (a priori σ₀): docs/standards.md."""
    traverse = _adjusted("closed_traverse")
    assert traverse.summary.redundancy == 10
    assert traverse.summary.ellipse_factor == pytest.approx(2.8645, abs=5e-5)
    none = adjust_fieldbook(TWO_POINTS.format(sigma=5))
    assert none.summary.redundancy == 0
    assert none.summary.ellipse_factor == pytest.approx(2.4477, abs=5e-5)
    # and the large-r limit is the published 2D factor
    r = network.summary.redundancy
    assert network.summary.ellipse_factor == pytest.approx(
        math.sqrt(2 * scipy.stats.f.ppf(0.95, 2, r)), rel=1e-9
    )
    assert math.sqrt(2 * scipy.stats.f.ppf(0.95, 2, 10**7)) == pytest.approx(2.4477, abs=5e-5)


@pytest.mark.parametrize("unit", ["ft", "usft"])
def test_alta_preset_in_foot_books_uses_the_printed_0_07_ft(unit):
    """ALTA/NSPS prints "2 cm (0.07 feet)"; 2 cm is 0.0656 ft. The preset reads the figure in
    the job's unit (docs/standards.md): 0.07 of the book's foot, not 2 cm converted."""
    quantity = PRESETS["alta-nsps-2026"].quantity(unit)
    assert quantity.constant / LENGTH_FACTORS[unit] == pytest.approx(0.07, abs=1e-12)
    assert quantity.ppm == 50.0
    assert PRESETS["alta-nsps-2026"].quantity("m").constant == 0.02


def test_presets_name_their_published_sources_and_status():
    alta = PRESETS["alta-nsps-2026"]
    assert alta.verified and alta.kind == "relative"
    assert "ALTA/NSPS" in alta.source and "2026" in alta.source and "§3.E" in alta.source
    assert "2 cm (0.07 ft) + 50 ppm" in alta.source
    for key, preset in PRESETS.items():
        if key.startswith("fgcc-1984-"):
            assert preset.kind == "misclosure" and not preset.verified, key
            assert "FGCC (1984)" in preset.source and "§3.5" in preset.source, key
            assert "from memory" in preset.source, key


def test_fgcc_section_and_loop_constants_as_recalled():
    """FGCC 1984 §3.5, from memory (docs/references.md "FGCC 1984 leveling allowances"):
    sections 3/4/6/8/12 mm·√D,
    loops 4/5/6/8/12 mm·√E; a 3rd-order 10 km line allows 37.95 mm (computed)."""
    assert [
        FGCC_1984_LEVELING[k]
        for k in (
            "first-order-class-I",
            "first-order-class-II",
            "second-order-class-I",
            "second-order-class-II",
            "third-order",
        )
    ] == [(3.0, 4.0), (4.0, 5.0), (6.0, 6.0), (8.0, 8.0), (12.0, 12.0)]
    third = PRESETS["fgcc-1984-third-order"].quantity("m")
    assert third.allowance_level(10.0, None) * 1000 == pytest.approx(37.95, abs=0.005)


def test_docs_list_every_preset_with_its_status():
    text = (ROOT / "docs" / "standards.md").read_text(encoding="utf-8")
    for key, preset in PRESETS.items():
        row = next((line for line in text.splitlines() if line.startswith(f"| `{key}` |")), None)
        assert row is not None, f"docs/standards.md has no row for {key}"
        assert ("**verified**" if preset.verified else "**from memory**") in row, key
    assert "√(2·F(p; 2, r))" in text and "2.4477" in text and "0.07 ft" in text


# ---------------------------------------------------------------------------------------
# histogram of w


def test_histogram_bins_hold_every_tested_observation_once(blunder):
    h = w_histogram(blunder)
    tested = [o.w for o in blunder.observations if o.w is not None]
    assert h.tested == len(tested) == sum(h.counts) + h.below + h.above
    assert h.bin_width == BIN_WIDTH
    assert h.edges[0] <= -4.0 and h.edges[-1] >= 4.0
    assert 0.0 in h.edges  # bins are cut at zero, not straddling it
    for w in tested:
        k = next(i for i in range(len(h.counts)) if h.edges[i] <= w < h.edges[i + 1])
        assert h.counts[k] >= 1
    # the blunder's w is the one beyond the critical value, alone in its bin
    flagged = [o for o in blunder.observations if o.flagged]
    assert [o.line for o in flagged] == [BLUNDER_LINE]
    assert h.beyond == 1 and sum(h.flagged_counts) == 1
    k = h.flagged_counts.index(1)
    assert h.edges[k] <= flagged[0].w < h.edges[k + 1]


def test_histogram_keeps_a_gross_blunder_in_an_overflow_bin():
    """One direction 20″ off gives w ≈ −23: counted apart, not stretching the axis to −23."""
    result = _adjusted("network_direction_blunder")
    h = w_histogram(result)
    ws = [o.w for o in result.observations if o.w is not None]
    assert min(ws) < -20
    assert h.edges[0] == -8.0 and h.edges[-1] <= 8.0
    assert h.below == sum(w < -8.0 for w in ws) == 1
    assert h.above == sum(w > h.edges[-1] for w in ws)
    assert sum(h.counts) + h.below + h.above == h.tested
    assert h.largest == pytest.approx(max(abs(w) for w in ws))


def test_histogram_reference_curve_is_the_expected_count_per_bin(network):
    """Under H0 each w is N(0, 1): a bin of width Δ at w holds n·Δ·φ(w) on average."""
    h = w_histogram(network)
    assert expected_count(h, 0.0) == pytest.approx(h.tested * 0.5 * 0.3989423, rel=1e-6)
    assert expected_count(h, 1.96) == pytest.approx(
        h.tested * 0.5 * scipy.stats.norm.pdf(1.96), rel=1e-9
    )


def test_no_histogram_without_tested_observations():
    result = adjust_fieldbook(TWO_POINTS.format(sigma=5))
    assert w_histogram(result) is None
    assert "Standardized residuals" not in html_report.report_html(result)


# ---------------------------------------------------------------------------------------
# the self-contained HTML report


def test_html_report_draws_the_network_and_the_histogram_inline(network):
    html = html_report.report_html(network)
    plot = re.search(r'<svg class="np-map".*?</svg>', html, re.DOTALL)
    assert plot, "the 2D report has the network plot"
    assert plot.group(0).count('<g class="np-pt ') == len(network.points)
    assert plot.group(0).count('<ellipse class="np-ell"') == sum(
        p.ellipse is not None for p in network.points
    )
    assert '<svg class="w-hist-svg"' in html
    # the static plot has no controls, no detail panel and no data block
    assert "np-toolbar" not in html and "np-panel" not in html and "np-data" not in html


def test_html_report_loads_nothing_from_outside(network):
    html = html_report.report_html(network)
    assert "<script" not in html and "<link" not in html and "<iframe" not in html
    assert not re.search(r"\b(src|href)\s*=", html)
    assert "url(" not in html and "@import" not in html
    # the only address is the SVG namespace name, which nothing fetches
    assert set(re.findall(r"https?://[^\s\"'<>]+", html)) <= {"http://www.w3.org/2000/svg"}


def test_html_report_puts_the_standards_summary_first_with_symbol_and_word(blunder):
    html = html_report.report_html(blunder)
    body = html.split("<body>", 1)[1]
    exceeded = sum(m.exceeds for m in blunder.misclosures)
    summary = f"Fail: {exceeded} of {len(blunder.misclosures)} loops and runs exceed the allowance"
    assert summary in body
    assert body.index("Accuracy standards") < body.index("Adjusted points")
    check = re.search(r'<li class="check check-fail"><span class="check-mark"[^>]*>✕</span>', body)
    assert check, "the failed check shows ✕ beside the word, not colour alone"


def test_html_report_lists_relative_precision_per_pair(network):
    html = html_report.report_html(network)
    assert html.count("✓ meets") == sum(r.passed is True for r in network.relative)
    assert "Pass: 64 joined pairs within the allowance; pairs neither joined" in html
    assert html.count(CAUTION) == 2


# ---------------------------------------------------------------------------------------
# exports


def test_csv_guard_covers_every_formula_start():
    """=, +, -, @ (and tab, CR) start formulas in spreadsheets; an apostrophe keeps them text."""
    for text in ("=SUM(A1)", "+1", "-X", "@A1", "\tX", "\rX"):
        assert safe_cell(text) == "'" + text
    assert safe_cell("BM-1") == "BM-1"


def test_points_csv_parses_and_keeps_numbers_numeric(client):
    text = (
        b"defaults level=1mm\npoint +1 height=10 fix\npoint -X height=-2.5 fix\n"
        b"level +1 @A1 -12.0000\nlevel -X @A1 0.5000\n"
    )
    response = client.post(
        "/projects", files={"fieldbook": ("f.fieldbook", text)}, follow_redirects=False
    )
    url = response.headers["location"]
    rows = list(csv.DictReader(io.StringIO(client.get(f"{url}/points.csv").text)))
    assert [r["name"] for r in rows] == ["'+1", "'-X", "'@A1"]
    heights = {r["name"]: float(r["height"]) for r in rows}  # float() fails on "'-2.5"
    assert heights["'-X"] == -2.5
    assert heights["'@A1"] == pytest.approx(-2.0, abs=1e-4)


def test_geojson_download_is_valid_and_matches_the_points(client):
    """With a crs line: longitude, latitude and ellipsoidal height (RFC 7946 §3.1.1), the
    same numbers as the result's."""
    url = _open_demo(client, "dam_control_3d")
    response = client.get(f"{url}/points.geojson")
    assert response.status_code == 200
    assert response.headers["content-type"].startswith("application/geo+json")
    assert "attachment" in response.headers["content-disposition"]
    data = json.loads(response.text)  # RFC 7946 forbids NaN; json.loads would accept it
    assert "NaN" not in response.text
    assert data["type"] == "FeatureCollection"
    points = {f["properties"]["name"]: f for f in data["features"] if f["id"].startswith("point:")}
    result = json.loads(client.get(f"{url}/result.json").text)
    for p in result["points"]:
        feature = points[p["name"]]
        if p["latitude"] is None:  # a benchmark with a height only: unlocated
            assert feature["geometry"] is None
            continue
        assert feature["geometry"]["type"] == "Point"
        assert feature["geometry"]["coordinates"] == [
            p["longitude"],
            p["latitude"],
            p["ellipsoidal_height"],
        ]
        assert feature["properties"]["sd_east"] == p["sd_east"]
    for f in data["features"]:
        if f["id"].startswith("line:") and f["geometry"] is not None:
            assert f["geometry"]["type"] == "LineString"
            ends = [tuple(c) for c in f["geometry"]["coordinates"]]
            located = {
                tuple(g["geometry"]["coordinates"][:2])
                for g in points.values()
                if g["geometry"] is not None
            }
            assert set(ends) <= located


# ---------------------------------------------------------------------------------------
# the web page and its downloads


def test_results_page_offers_presets_and_downloads_carry_the_choice(client):
    url = _open_demo(client, "closed_traverse")
    html = client.get(f"{url}?relative=alta-nsps-2026").text
    assert '<option value="alta-nsps-2026" selected>' in html
    assert "Allowance: ALTA/NSPS relative positional precision (preset)" in html
    for path in ("report.pdf", "report.html", "points.csv", "result.json"):
        assert f'href="{url}/{path}?relative=alta-nsps-2026"' in html, path
    # no crs line: no longitude and latitude, so no GeoJSON is offered, and the page says why
    assert "points.geojson" not in html and "No GeoJSON: geojson holds" not in html
    assert "add &#39;crs EPSG:CODE&#39;" in html
    refused = client.get(f"{url}/points.geojson")
    assert refused.status_code == 409 and "crs" in refused.text
    # feet book: 0.07 ft + 50 ppm (docs/standards.md), in the JSON the download carries
    body = client.get(f"{url}/result.json?relative=alta-nsps-2026").json()
    for r in body["relative"]:
        assert r["allowed"] == pytest.approx(0.07 + 50e-6 * r["distance"], rel=1e-9)
        assert r["passed"] == (r["semi_major"] <= r["allowed"])


def test_contract_json_keeps_the_field_books_tolerance_unless_a_preset_is_asked(client):
    url = _open_demo(client, "leveling_blunder")
    own = client.get(f"{url}/result.json").json()
    for m in own["misclosures"]:  # the file says tolerance misclosure=5mm/sqrtkm
        assert m["allowed"] == pytest.approx(0.005 * math.sqrt(m["length"] / 1000), rel=1e-9)
    third = client.get(f"{url}/result.json?misclosure=fgcc-1984-third-order").json()
    for m in third["misclosures"]:  # 12 mm·√K, FGCC 1984 third order (from memory)
        assert m["allowed"] == pytest.approx(0.012 * math.sqrt(m["length"] / 1000), rel=1e-9)
        assert m["exceeds"] == (abs(m["misclosure"]) > m["allowed"])
    assert client.get(f"{url}/result.json").json() == own  # the stored run is unchanged


def test_results_page_shows_the_standards_summary_at_the_top(client):
    url = _open_demo(client, "leveling_blunder")
    html = client.get(url).text
    assert html.index('id="standards"') < html.index('id="points"')
    assert "Fail: 2 of 11 loops and runs exceed the allowance" in html
    relaxed = client.get(f"{url}?misclosure=fgcc-1984-third-order").text
    assert "Pass: all 11 loops and runs within the allowance" in relaxed
    assert "(constants from memory)" in relaxed


def test_unknown_preset_is_refused_with_the_choices(client):
    url = _open_demo(client, "leveling_blunder")
    for query in (
        "?relative=alta",
        "?misclosure=alta-nsps-2026",
        "?relative=fgcc-1984-third-order",
    ):
        response = client.get(f"{url}/report.pdf{query}")
        assert response.status_code == 400, query
    assert "fgcc-1984-third-order" in client.get(f"{url}?misclosure=nope").text


def test_pdf_download_is_a_pdf_naming_the_preset(client):
    url = _open_demo(client, "leveling_blunder")
    response = client.get(f"{url}/report.pdf?misclosure=fgcc-1984-third-order")
    assert response.status_code == 200
    assert response.headers["content-type"] == "application/pdf"
    assert response.headers["content-disposition"] == (
        'attachment; filename="leveling_blunder-report.pdf"'
    )
    reader = pypdf.PdfReader(io.BytesIO(response.content))
    text = re.sub(r"\s+", " ", " ".join(page.extract_text() for page in reader.pages))
    assert "FGCC 1984 leveling, third order (12 mm·√K) (preset)" in text
    assert text.count(CAUTION) == len(reader.pages)


def test_cli_writes_the_pdf_report_and_prints_the_standards(tmp_path, capsys):
    out = tmp_path / "report.pdf"
    status = main(["adjust", str(DEMOS / "leveling_blunder.fieldbook"), "--pdf", str(out)])
    assert status == 0
    reader = pypdf.PdfReader(out)
    assert CAUTION in re.sub(r"\s+", " ", reader.pages[-1].extract_text())
    printed = capsys.readouterr().out
    assert "✕ Leveling misclosures: Fail: 2 of 11 loops and runs exceed the allowance." in printed
